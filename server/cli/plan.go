package cli

import (
	"context"
	"errors"
)

// runPlan is not built yet; its owner replaces this file.
func runPlan(ctx context.Context, env Env, args []string) error {
	return errors.New("plan: not built yet")
}
