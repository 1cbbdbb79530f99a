package cli

import (
	"context"
	"errors"
)

// benchE2E is not built yet; its owner replaces this file.
func benchE2E(ctx context.Context, env Env, args []string) error {
	return errors.New("bench --e2e: not built yet")
}
