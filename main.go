// Command sparsewatch watches image-frame sequences for small local changes
// while reading only a budget of pixels per frame. Run `sparsewatch --help`.
package main

import (
	"context"
	"os"
	"os/signal"
	"syscall"

	"sparsewatch/server/cli"
)

func main() {
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	code := cli.Main(ctx, os.Args[1:], os.Stdin, os.Stdout, os.Stderr)
	stop()
	os.Exit(code)
}
