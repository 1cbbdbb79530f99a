package live

import (
	"context"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"sync"
	"time"

	"sparsewatch/frames"
)

// OutsideRootError reports a folder or file that is not inside the root the
// operator configured; nothing was read from it.
type OutsideRootError struct {
	Path, Root string
}

func (e *OutsideRootError) Error() string {
	return fmt.Sprintf("frames: %q is outside the watched-folder root %q", e.Path, e.Root)
}

// DefaultExtensions are the file types a watched folder picks up.
var DefaultExtensions = []string{".png", ".jpg", ".jpeg", ".gif", ".bmp", ".tif", ".tiff", ".webp", ".fits", ".fit", ".fts"}

// FolderConfig sets up a watched folder. Zero fields take the defaults given
// beside them.
type FolderConfig struct {
	Root string // the operator's root; Dir must resolve to a folder inside it
	Dir  string // the folder to follow, absolute or relative to Root

	Interval     time.Duration // between scans (500 ms)
	Queue        int           // frames waiting for the consumer (4)
	Drop         bool          // drop the oldest queued frame instead of waiting when full
	SkipExisting bool          // ignore files present at the first scan
	MaxFileBytes int64         // larger files are skipped (256 MB)
	Extensions   []string      // lower-case, with the dot (DefaultExtensions)

	Events func(Event)
	Logger *slog.Logger
}

// Folder delivers each new frame file of a folder once, in natural order
// (frame2 before frame10) among the files found by one scan. A file is taken
// when two scans in a row see the same size and modification time, so a
// file still being written is not read half-way (a frame therefore arrives
// one to two scan intervals after it appears).
type Folder struct {
	cfg     FolderConfig
	root    string // resolved
	dir     string // as configured, absolute
	q       *queue
	n       counters
	once    sync.Once
	seen    map[string]bool      // names delivered or skipped
	pending map[string]fileStamp // names seen once, waiting to settle
	last    string               // last delivered name, to notice late arrivals
}

type fileStamp struct {
	size int64
	mod  time.Time
}

// NewFolder resolves Root and Dir (following symbolic links) and refuses a
// Dir outside Root with an *OutsideRootError.
func NewFolder(cfg FolderConfig) (*Folder, error) {
	if cfg.Root == "" {
		return nil, errors.New("frames: watched folder needs a root")
	}
	root, err := filepath.Abs(cfg.Root)
	if err != nil {
		return nil, fmt.Errorf("frames: watched-folder root: %w", err)
	}
	if root, err = filepath.EvalSymlinks(root); err != nil {
		return nil, fmt.Errorf("frames: watched-folder root: %w", err)
	}
	dir := cfg.Dir
	if !filepath.IsAbs(dir) {
		dir = filepath.Join(root, dir)
	}
	f := &Folder{cfg: cfg, root: root, dir: dir, seen: map[string]bool{}, pending: map[string]fileStamp{}}
	if _, err := f.resolveDir(); err != nil {
		return nil, err
	}
	if f.cfg.Interval <= 0 {
		f.cfg.Interval = 500 * time.Millisecond
	}
	if f.cfg.Queue <= 0 {
		f.cfg.Queue = 4
	}
	if f.cfg.MaxFileBytes <= 0 {
		f.cfg.MaxFileBytes = 256 << 20
	}
	if f.cfg.Extensions == nil {
		f.cfg.Extensions = DefaultExtensions
	}
	if f.cfg.Logger == nil {
		f.cfg.Logger = slog.Default()
	}
	f.q = newQueue(f.cfg.Queue, f.cfg.Drop, &f.n)
	return f, nil
}

// inside reports whether the resolved path p lies in the resolved root.
func (f *Folder) inside(p string) bool {
	rel, err := filepath.Rel(f.root, p)
	return err == nil && rel != ".." && !strings.HasPrefix(rel, ".."+string(filepath.Separator)) && !filepath.IsAbs(rel)
}

// resolveDir resolves the folder again at every scan, so a folder swapped
// for a link to elsewhere is noticed.
func (f *Folder) resolveDir() (string, error) {
	d, err := filepath.EvalSymlinks(f.dir)
	if err != nil {
		return "", fmt.Errorf("frames: watched folder: %w", err)
	}
	if !f.inside(d) {
		return "", &OutsideRootError{Path: f.cfg.Dir, Root: f.cfg.Root}
	}
	st, err := os.Stat(d)
	if err != nil {
		return "", fmt.Errorf("frames: watched folder: %w", err)
	}
	if !st.IsDir() {
		return "", fmt.Errorf("frames: watched folder %q is not a folder", f.cfg.Dir)
	}
	return d, nil
}

// Frames is where frames arrive; it is closed when Run returns.
func (f *Folder) Frames() <-chan Frame { return f.q.ch }

// Counts returns the running totals.
func (f *Folder) Counts() Counts { return f.n.snapshot() }

// Run scans until ctx ends (returning ctx.Err()) or the folder goes away or
// leaves the root (returning that error).
func (f *Folder) Run(ctx context.Context) error {
	defer f.once.Do(func() { close(f.q.ch) })
	first := true
	t := time.NewTicker(f.cfg.Interval)
	defer t.Stop()
	for {
		if err := f.scan(ctx, first); err != nil {
			if ctx.Err() != nil {
				return ctx.Err()
			}
			return err
		}
		first = false
		select {
		case <-ctx.Done():
			return ctx.Err()
		case <-t.C:
		}
	}
}

func (f *Folder) scan(ctx context.Context, first bool) error {
	dir, err := f.resolveDir()
	if err != nil {
		return err
	}
	entries, err := os.ReadDir(dir)
	if err != nil {
		return fmt.Errorf("frames: watched folder: %w", err)
	}
	present := make(map[string]bool, len(entries))
	var ready []string
	for _, e := range entries {
		name := e.Name()
		if e.IsDir() || strings.HasPrefix(name, ".") || !slices.Contains(f.cfg.Extensions, strings.ToLower(filepath.Ext(name))) {
			continue
		}
		present[name] = true
		if f.seen[name] {
			continue
		}
		if first && f.cfg.SkipExisting {
			f.seen[name] = true
			continue
		}
		info, err := os.Stat(filepath.Join(dir, name)) // follows links; checked on reading
		if err != nil {
			continue // gone meanwhile
		}
		st := fileStamp{info.Size(), info.ModTime()}
		if prev, ok := f.pending[name]; ok && prev == st {
			ready = append(ready, name)
			delete(f.pending, name)
			continue
		}
		f.pending[name] = st
	}
	// Forget names that disappeared, so a new file of the same name is new.
	for name := range f.seen {
		if !present[name] {
			delete(f.seen, name)
		}
	}
	for name := range f.pending {
		if !present[name] {
			delete(f.pending, name)
		}
	}
	frames.SortNatural(ready)
	for _, name := range ready {
		f.seen[name] = true
		data, err := f.read(dir, name)
		if err != nil {
			f.n.bad.Add(1)
			f.emit(Event{Kind: EventBadFrame, Err: err})
			continue
		}
		if f.last != "" && frames.NaturalLess(name, f.last) {
			f.cfg.Logger.Info("watched folder: file arrived after later ones", "file", name, "after", f.last)
		} else {
			f.last = name
		}
		fr := Frame{Seq: f.n.received.Load(), Name: name, Data: data, Format: formatOf(data), Arrived: time.Now()}
		if fr.Format == "" {
			fr.Format = strings.TrimPrefix(strings.ToLower(filepath.Ext(name)), ".")
		}
		if err := f.q.put(ctx, fr); err != nil {
			return err
		}
	}
	return nil
}

// read reads one regular file inside the root, at most MaxFileBytes.
func (f *Folder) read(dir, name string) ([]byte, error) {
	p := filepath.Join(dir, name)
	real, err := filepath.EvalSymlinks(p)
	if err != nil {
		return nil, fmt.Errorf("frames: %s: %w", name, err)
	}
	if !f.inside(real) {
		return nil, &OutsideRootError{Path: name, Root: f.cfg.Root}
	}
	file, err := os.Open(real)
	if err != nil {
		return nil, fmt.Errorf("frames: %s: %w", name, err)
	}
	defer file.Close()
	info, err := file.Stat()
	if err != nil {
		return nil, fmt.Errorf("frames: %s: %w", name, err)
	}
	if !info.Mode().IsRegular() {
		return nil, fmt.Errorf("frames: %s: not a regular file", name)
	}
	if info.Size() == 0 {
		return nil, fmt.Errorf("frames: %s: empty file", name)
	}
	if info.Size() > f.cfg.MaxFileBytes {
		return nil, fmt.Errorf("frames: %s: %d bytes is over the %d-byte limit", name, info.Size(), f.cfg.MaxFileBytes)
	}
	data, err := io.ReadAll(io.LimitReader(file, f.cfg.MaxFileBytes+1))
	if err != nil {
		return nil, fmt.Errorf("frames: %s: %w", name, err)
	}
	if int64(len(data)) > f.cfg.MaxFileBytes {
		return nil, fmt.Errorf("frames: %s: grew over the %d-byte limit", name, f.cfg.MaxFileBytes)
	}
	return data, nil
}

func (f *Folder) emit(e Event) {
	e.Time = time.Now()
	if e.Kind == EventBadFrame {
		f.cfg.Logger.Warn("watched folder: file skipped", "err", e.Err)
	}
	if f.cfg.Events != nil {
		f.cfg.Events(e)
	}
}
