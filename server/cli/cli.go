// Package cli turns a command line into a run of one sub-command; each
// sub-command lives in its own file and only parses flags and calls the
// packages that do the work.
package cli

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"sort"
)

// Env is what a sub-command may touch of the outside world.
type Env struct {
	Stdin  io.Reader
	Stdout io.Writer
	Stderr io.Writer
}

type command struct {
	summary string
	run     func(ctx context.Context, env Env, args []string) error
}

// commands is the whole table of sub-commands; "serve" is the default.
var commands = map[string]command{
	"serve":     {"serve the watcher page and API (default)", runServe},
	"scan":      {"review a folder, .zip or piped frames offline and print a report", runScan},
	"calibrate": {"find the control limit for a target false-alarm rate", runCalibrate},
	"plan":      {"predict detection delay against budget for each sampling policy", runPlan},
	"demo":      {"write an invented demo scenario's frames and ground truth", runDemo},
	"bench":     {"measure engine and end-to-end throughput", runBench},
}

// Main runs the sub-command named by args[0] and returns the exit code.
func Main(ctx context.Context, args []string, stdin io.Reader, stdout, stderr io.Writer) int {
	env := Env{Stdin: stdin, Stdout: stdout, Stderr: stderr}
	name := "serve"
	if len(args) > 0 {
		switch args[0] {
		case "-h", "--help", "help":
			usage(stdout)
			return 0
		}
		if _, ok := commands[args[0]]; ok {
			name, args = args[0], args[1:]
		} else if args[0] != "" && args[0][0] != '-' {
			fmt.Fprintf(stderr, "sparsewatch: unknown command %q\n\n", args[0])
			usage(stderr)
			return 2
		}
	}
	err := commands[name].run(ctx, env, args)
	switch {
	case err == nil:
		return 0
	case errors.Is(err, flag.ErrHelp):
		return 0
	case errors.Is(err, errUsage):
		return 2
	default:
		fmt.Fprintf(stderr, "sparsewatch %s: %v\n", name, err)
		return 1
	}
}

// errUsage marks an error already explained by the flag package.
var errUsage = errors.New("usage")

func usage(w io.Writer) {
	fmt.Fprintln(w, "sparsewatch: watch image-frame sequences for small local changes, reading only a budget of pixels per frame.")
	fmt.Fprintln(w, "\nUsage: sparsewatch [command] [flags]   (no command = serve on 127.0.0.1:8080 with a demo ready)")
	fmt.Fprintln(w, "\nCommands:")
	names := make([]string, 0, len(commands))
	for n := range commands {
		names = append(names, n)
	}
	sort.Strings(names)
	for _, n := range names {
		fmt.Fprintf(w, "  %-10s %s\n", n, commands[n].summary)
	}
	fmt.Fprintln(w, "\nRun `sparsewatch COMMAND --help` for the flags of one command.")
}

// newFlags returns a flag set that prints its usage to env.Stderr.
func newFlags(env Env, name, synopsis string) *flag.FlagSet {
	fs := flag.NewFlagSet(name, flag.ContinueOnError)
	fs.SetOutput(env.Stderr)
	fs.Usage = func() {
		fmt.Fprintf(env.Stderr, "Usage: sparsewatch %s\n\nFlags:\n", synopsis)
		fs.PrintDefaults()
	}
	return fs
}

// parse parses args and maps flag errors to errUsage / flag.ErrHelp.
func parse(fs *flag.FlagSet, args []string) error {
	if err := fs.Parse(args); err != nil {
		if errors.Is(err, flag.ErrHelp) {
			return flag.ErrHelp
		}
		return errUsage
	}
	return nil
}
