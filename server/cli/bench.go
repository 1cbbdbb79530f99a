package cli

import (
	"context"
	"errors"
)

// runBench is not built yet; its owner replaces this file.
func runBench(ctx context.Context, env Env, args []string) error {
	return errors.New("bench: not built yet")
}
