package cli

import (
	"context"
	"errors"
)

// runCalibrate is not built yet; its owner replaces this file.
func runCalibrate(ctx context.Context, env Env, args []string) error {
	return errors.New("calibrate: not built yet")
}
