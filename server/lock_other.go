//go:build !unix

package server

import "os"

// lockDataDir is a no-op where flock is not available.
func lockDataDir(dir string) (*os.File, error) { return nil, nil }
