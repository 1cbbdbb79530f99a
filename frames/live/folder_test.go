package live

import (
	"bytes"
	"context"
	"errors"
	"os"
	"path/filepath"
	"testing"
	"time"
)

func mustWrite(tb testing.TB, path string, data []byte) {
	tb.Helper()
	if err := os.WriteFile(path, data, 0o644); err != nil {
		tb.Fatal(err)
	}
}

func mustFolder(tb testing.TB, cfg FolderConfig) *Folder {
	tb.Helper()
	if cfg.Logger == nil {
		cfg.Logger = quiet
	}
	f, err := NewFolder(cfg)
	if err != nil {
		tb.Fatal(err)
	}
	return f
}

// drain takes whatever is queued now.
func drain(f *Folder) []Frame {
	var out []Frame
	for {
		select {
		case fr := <-f.q.ch:
			out = append(out, fr)
		default:
			return out
		}
	}
}

func names(fs []Frame) []string {
	var out []string
	for _, f := range fs {
		out = append(out, f.Name)
	}
	return out
}

// TestFolderScans drives the scans by hand, so settling and order are
// checked without timing.
func TestFolderScans(t *testing.T) {
	root := t.TempDir()
	dir := filepath.Join(root, "cam")
	if err := os.Mkdir(dir, 0o755); err != nil {
		t.Fatal(err)
	}
	jpgs := demoJPEGs(t, 0, 3)
	mustWrite(t, filepath.Join(dir, "frame1.jpg"), jpgs[0])
	f := mustFolder(t, FolderConfig{Root: root, Dir: "cam", Queue: 16})
	ctx := context.Background()
	scan := func(first bool) []string {
		t.Helper()
		if err := f.scan(ctx, first); err != nil {
			t.Fatal(err)
		}
		return names(drain(f))
	}
	if got := scan(true); len(got) != 0 {
		t.Fatalf("first scan delivered %v before the file settled", got)
	}
	if got := scan(false); len(got) != 1 || got[0] != "frame1.jpg" {
		t.Fatalf("second scan delivered %v, want frame1.jpg", got)
	}
	// Two files at once arrive in natural order; other files are ignored.
	mustWrite(t, filepath.Join(dir, "frame10.jpg"), jpgs[2])
	mustWrite(t, filepath.Join(dir, "frame2.jpg"), jpgs[1])
	mustWrite(t, filepath.Join(dir, "notes.txt"), []byte("x"))
	mustWrite(t, filepath.Join(dir, ".frame3.jpg.part"), []byte("x"))
	// A file still growing is held back until two scans agree.
	half := jpgs[0][:len(jpgs[0])/2]
	mustWrite(t, filepath.Join(dir, "frame11.jpg"), half)
	scan(false)
	fh, err := os.OpenFile(filepath.Join(dir, "frame11.jpg"), os.O_APPEND|os.O_WRONLY, 0)
	if err != nil {
		t.Fatal(err)
	}
	fh.Write(jpgs[0][len(half):])
	fh.Close()
	got := drain(f)
	if err := f.scan(ctx, false); err != nil {
		t.Fatal(err)
	}
	got = append(got, drain(f)...)
	if len(got) != 2 || got[0].Name != "frame2.jpg" || got[1].Name != "frame10.jpg" {
		t.Fatalf("delivered %v, want frame2.jpg then frame10.jpg", names(got))
	}
	if !bytes.Equal(got[0].Data, jpgs[1]) || got[0].Format != "jpeg" {
		t.Error("frame2.jpg bytes or format wrong")
	}
	got = append(got[:0], func() []Frame { f.scan(ctx, false); return drain(f) }()...)
	if len(got) != 1 || got[0].Name != "frame11.jpg" || !bytes.Equal(got[0].Data, jpgs[0]) {
		t.Fatalf("grown file: delivered %v, want the whole frame11.jpg", names(got))
	}
	// Nothing is delivered twice.
	if got := scan(false); len(got) != 0 {
		t.Errorf("a quiet folder delivered %v again", got)
	}
	// A removed and re-created file is new.
	os.Remove(filepath.Join(dir, "frame1.jpg"))
	scan(false)
	mustWrite(t, filepath.Join(dir, "frame1.jpg"), jpgs[0])
	scan(false)
	if got := scan(false); len(got) != 1 || got[0] != "frame1.jpg" {
		t.Errorf("re-created file: delivered %v", got)
	}
}

func TestFolderSkipExistingAndBadFiles(t *testing.T) {
	root := t.TempDir()
	outside := t.TempDir()
	mustWrite(t, filepath.Join(root, "old.png"), []byte("old"))
	mustWrite(t, filepath.Join(outside, "secret.png"), []byte("secret"))
	var log eventLog
	f := mustFolder(t, FolderConfig{Root: root, Dir: ".", SkipExisting: true, Queue: 16, MaxFileBytes: 100, Events: log.add})
	ctx := context.Background()
	f.scan(ctx, true)
	if err := os.Symlink(filepath.Join(outside, "secret.png"), filepath.Join(root, "link.png")); err != nil {
		t.Skip("no symbolic links here:", err)
	}
	mustWrite(t, filepath.Join(root, "empty.png"), nil)
	mustWrite(t, filepath.Join(root, "big.png"), bytes.Repeat([]byte("x"), 101))
	mustWrite(t, filepath.Join(root, "new.png"), []byte("new"))
	f.scan(ctx, false)
	f.scan(ctx, false)
	got := drain(f)
	if len(got) != 1 || got[0].Name != "new.png" || string(got[0].Data) != "new" || got[0].Format != "png" {
		t.Fatalf("delivered %v, want only new.png", names(got))
	}
	if n := f.Counts(); n.Bad != 3 || log.count(EventBadFrame) != 3 {
		t.Errorf("bad %d, events %d; want 3 (link outside the root, empty, too big)", n.Bad, log.count(EventBadFrame))
	}
	var outsideErr bool
	for _, e := range log.ev {
		var o *OutsideRootError
		outsideErr = outsideErr || errors.As(e.Err, &o)
	}
	if !outsideErr {
		t.Error("the link out of the root was not reported as outside the root")
	}
}

func TestFolderOutsideRootRefused(t *testing.T) {
	root := t.TempDir()
	outside := t.TempDir()
	if err := os.Symlink(outside, filepath.Join(root, "escape")); err != nil {
		t.Skip("no symbolic links here:", err)
	}
	for _, dir := range []string{"..", "../" + filepath.Base(outside), outside, "escape", "/"} {
		_, err := NewFolder(FolderConfig{Root: root, Dir: dir, Logger: quiet})
		var o *OutsideRootError
		if !errors.As(err, &o) {
			t.Errorf("Dir %q: %v, want an OutsideRootError", dir, err)
		}
	}
	if _, err := NewFolder(FolderConfig{Root: root, Dir: "missing", Logger: quiet}); err == nil {
		t.Error("a missing folder was accepted")
	}
	if _, err := NewFolder(FolderConfig{Dir: root, Logger: quiet}); err == nil {
		t.Error("a watched folder without a root was accepted")
	}
}

// TestFolderRun follows a folder in real time: frames written while Run
// polls arrive in order, and Run ends with the context.
func TestFolderRun(t *testing.T) {
	root := t.TempDir()
	jpgs := demoJPEGs(t, 0, 3)
	f := mustFolder(t, FolderConfig{Root: root, Dir: root, Interval: 10 * time.Millisecond})
	ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
	defer cancel()
	done := make(chan error, 1)
	go func() { done <- f.Run(ctx) }()
	var got []string
	for i, name := range []string{"f8.jpg", "f9.jpg", "f10.jpg"} {
		mustWrite(t, filepath.Join(root, name), jpgs[i])
		fr := <-f.Frames()
		got = append(got, fr.Name)
	}
	cancel()
	if err := <-done; !errors.Is(err, context.Canceled) {
		t.Errorf("Run returned %v", err)
	}
	if len(got) != 3 || got[0] != "f8.jpg" || got[2] != "f10.jpg" {
		t.Errorf("got %v", got)
	}
	if _, ok := <-f.Frames(); ok {
		t.Error("Frames not closed after Run")
	}
}
