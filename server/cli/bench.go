package cli

import (
	"context"
	"errors"
	"flag"
)

// runBench dispatches to the engine benchmark (bench_engine.go) or the
// end-to-end benchmark (bench_e2e.go).
func runBench(ctx context.Context, env Env, args []string) error {
	for _, a := range args {
		switch a {
		case "--engine", "-engine":
			return benchEngine(ctx, env, args)
		case "--e2e", "-e2e":
			return benchE2E(ctx, env, args)
		}
	}
	for _, a := range args {
		if a == "-h" || a == "--help" {
			env.Stderr.Write([]byte("Usage: sparsewatch bench --engine [flags] | bench --e2e DIR [flags]\n"))
			return flag.ErrHelp
		}
	}
	return errors.New("say --engine or --e2e DIR (see --help)")
}
