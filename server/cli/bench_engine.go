package cli

import (
	"context"
	"errors"
)

// benchEngine is not built yet; its owner replaces this file.
func benchEngine(ctx context.Context, env Env, args []string) error {
	return errors.New("bench --engine: not built yet")
}
