package cli

import (
	"context"
	"errors"
)

// runScan is not built yet; its owner replaces this file.
func runScan(ctx context.Context, env Env, args []string) error {
	return errors.New("scan: not built yet")
}
