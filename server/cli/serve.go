package cli

import (
	"context"
	"errors"
)

// runServe is not built yet; its owner replaces this file.
func runServe(ctx context.Context, env Env, args []string) error {
	return errors.New("serve: not built yet")
}
