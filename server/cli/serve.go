package cli

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"log/slog"
	"net"
	"os"
	"path/filepath"
	"strings"

	"sparsewatch/frames/live"
	"sparsewatch/server"
)

// multiFlag collects a repeatable string flag.
type multiFlag []string

func (m *multiFlag) String() string     { return strings.Join(*m, ",") }
func (m *multiFlag) Set(v string) error { *m = append(*m, v); return nil }

// runServe serves the page and the API. With no arguments at all it also
// makes sure a demo scenario session is ready and prints its owner URL.
func runServe(ctx context.Context, env Env, args []string) error {
	fs := newFlags(env, "serve", "serve [--addr 127.0.0.1:8080] [--data DIR] [--allow-camera-url PREFIX ...] [--watch-root DIR] [--stdin-frames [--stdin-params JSON]] [--demo NAME]")
	addr := fs.String("addr", "127.0.0.1:8080", "listen address")
	data := fs.String("data", defaultDataDir(), "data directory (sessions, uploads, alarm logs)")
	maxUpload := fs.Int64("max-upload", 1<<30, "largest upload in bytes")
	maxPixels := fs.Int("max-pixels", 64<<20, "largest frame in pixels (width x height)")
	demo := fs.String("demo", "", "also start a session of this demo scenario (\"default\" = the first one)")
	var allow multiFlag
	fs.Var(&allow, "allow-camera-url", "URL prefix the server may fetch camera frames from (repeatable)")
	watchRoot := fs.String("watch-root", "", "folder inside which sessions may watch folders for new frame files")
	stdinFrames := fs.Bool("stdin-frames", false, "also start a live session fed with concatenated PNG/JPEG images from standard input")
	stdinParams := fs.String("stdin-params", "", "session params of the standard-input session as JSON, e.g. {\"per_hours\":8,\"fps\":10}")
	if err := parse(fs, args); err != nil {
		return err
	}
	if fs.NArg() > 0 {
		fmt.Fprintf(env.Stderr, "serve: unexpected argument %q\n", fs.Arg(0))
		return errUsage
	}
	if len(args) == 0 {
		*demo = "default"
	}
	if _, err := live.NewAllowList(allow...); err != nil {
		return err
	}
	if *watchRoot != "" {
		if st, err := os.Stat(*watchRoot); err != nil || !st.IsDir() {
			return fmt.Errorf("serve: --watch-root %q is not a folder", *watchRoot)
		}
	}
	log := slog.New(slog.NewTextHandler(env.Stderr, &slog.HandlerOptions{Level: slog.LevelInfo}))
	// Listen first: a busy port is reported at once, before any review of
	// the data directory resumes (two servers must not share one).
	ln, err := net.Listen("tcp", *addr)
	if err != nil {
		return fmt.Errorf("%w (another server on this address? pick one with --addr)", err)
	}
	srv, err := server.New(server.Options{
		DataDir: *data, Addr: *addr, MaxUploadBytes: *maxUpload, MaxPixels: *maxPixels,
		AllowCameraURL: allow, WatchRoot: *watchRoot, Logger: log,
	})
	if err != nil {
		ln.Close()
		return err
	}
	base := "http://" + ln.Addr().String()
	srv.SetBaseURL(base)
	fmt.Fprintf(env.Stdout, "sparsewatch: serving %s (data in %s)\n", base, *data)
	if *demo != "" {
		url, err := srv.EnsureDemo(*demo)
		if err != nil {
			fmt.Fprintf(env.Stderr, "sparsewatch: no demo session: %v\n", err)
		} else {
			fmt.Fprintf(env.Stdout, "demo session (owner link): %s\n", url)
		}
	}
	if *stdinFrames {
		url, err := srv.CreateStdinSession(env.Stdin, "", json.RawMessage(*stdinParams))
		if err != nil {
			srv.Close()
			ln.Close()
			return fmt.Errorf("serve: standard-input session: %w", err)
		}
		fmt.Fprintf(env.Stdout, "standard-input session (owner link): %s\n", url)
	}
	err = srv.Serve(ctx, ln)
	if errors.Is(err, context.Canceled) {
		return nil
	}
	return err
}

// defaultDataDir is ./sparsewatch-data next to where the command runs,
// or the user's cache directory when the working directory is unknown.
func defaultDataDir() string {
	if wd, err := os.Getwd(); err == nil {
		return filepath.Join(wd, "sparsewatch-data")
	}
	if d, err := os.UserCacheDir(); err == nil {
		return filepath.Join(d, "sparsewatch")
	}
	return "sparsewatch-data"
}
