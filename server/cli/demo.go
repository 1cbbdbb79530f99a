package cli

import (
	"context"
	"fmt"
	"os"
	"path/filepath"

	"sparsewatch/samples"
)

// runDemo writes an invented scenario's frames and truth.json, so a user can
// try `scan` or the page on data whose answer is known.
func runDemo(ctx context.Context, env Env, args []string) error {
	fs := newFlags(env, "demo", "demo [--scenario NAME] [--out DIR] [--frames N] [--seed S] | demo --list")
	name := fs.String("scenario", "furnace", "scenario to write (see --list)")
	out := fs.String("out", "", "folder to write frames and truth.json into (default demo-NAME)")
	frames := fs.Int("frames", 0, "number of frames to write (default: the scenario's own length)")
	seed := fs.Uint64("seed", 0, "noise seed (default: the scenario's own seed)")
	list := fs.Bool("list", false, "list the scenarios and exit")
	if err := parse(fs, args); err != nil {
		return err
	}
	if fs.NArg() > 0 {
		fmt.Fprintf(env.Stderr, "unexpected argument %q\n\n", fs.Arg(0))
		fs.Usage()
		return errUsage
	}
	if *list {
		for _, n := range samples.Names() {
			s, err := samples.Lookup(n)
			if err != nil {
				return err
			}
			fmt.Fprintf(env.Stdout, "%-10s %dx%d, %d frames (%d reference)\n           %s\n",
				n, s.Width, s.Height, s.Frames, s.ReferenceFrames, s.Description)
		}
		return nil
	}
	s, err := samples.Lookup(*name)
	if err != nil {
		return err
	}
	if *frames < 0 {
		return fmt.Errorf("--frames must be positive, got %d", *frames)
	}
	if *frames > 0 {
		s.Frames = *frames
	}
	if *seed != 0 {
		s.Seed = *seed
	}
	dir := *out
	if dir == "" {
		dir = "demo-" + s.Name
	}
	tty := demoTTY(env.Stderr)
	progress := func(done, total int) {
		if tty && (done == total || done%10 == 0) {
			fmt.Fprintf(env.Stderr, "\rdemo %s: %d/%d frames", s.Name, done, total)
			if done == total {
				fmt.Fprintln(env.Stderr)
			}
		}
	}
	if err := s.Write(ctx, dir, progress); err != nil {
		if tty {
			fmt.Fprintln(env.Stderr)
		}
		return err
	}
	t := s.Truth()
	if s.Frames <= t.ChangeFrame {
		fmt.Fprintf(env.Stderr, "demo %s: note: the run ends before the change at frame %d, so it has none\n", s.Name, t.ChangeFrame)
	}
	fmt.Fprintf(env.Stderr, "demo %s: wrote %d frames and truth.json to %s (change at frame %d near (%g, %g))\n",
		s.Name, s.Frames, filepath.Clean(dir), t.ChangeFrame, t.Centre[0], t.Centre[1])
	return nil
}

// demoTTY reports whether w is a character device, so progress lines
// with carriage returns are shown only to people, not written into logs.
func demoTTY(w any) bool {
	f, ok := w.(*os.File)
	if !ok {
		return false
	}
	st, err := f.Stat()
	return err == nil && st.Mode()&os.ModeCharDevice != 0
}
