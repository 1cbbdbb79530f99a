package cli

import (
	"context"
	"errors"
)

// runDemo is not built yet; its owner replaces this file.
func runDemo(ctx context.Context, env Env, args []string) error {
	return errors.New("demo: not built yet")
}
