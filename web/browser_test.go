package web_test

import (
	"bytes"
	"context"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/chromedp/chromedp"
)

const chromiumPath = "/usr/bin/chromium"

// newBrowser starts a fresh headless chromium (BROWSER.md recipe) and
// returns its first tab. The browser log is printed only if the test fails.
func newBrowser(t *testing.T, timeout time.Duration) context.Context {
	t.Helper()
	if _, err := os.Stat(chromiumPath); err != nil {
		t.Skipf("browser tests need Debian's chromium at %s (apt-get install chromium): %v", chromiumPath, err)
	}
	var logBuf bytes.Buffer
	opts := []chromedp.ExecAllocatorOption{
		chromedp.ExecPath(chromiumPath), chromedp.Headless, chromedp.NoSandbox,
		chromedp.DisableGPU, chromedp.NoFirstRun, chromedp.NoDefaultBrowserCheck,
		chromedp.Flag("disable-background-networking", true),
		chromedp.Flag("disable-component-update", true),
		chromedp.Flag("disable-sync", true),
		chromedp.Flag("disable-dev-shm-usage", true),
		chromedp.WindowSize(1280, 900),
		chromedp.UserDataDir(t.TempDir()), chromedp.Env("TMPDIR=" + t.TempDir()),
		chromedp.CombinedOutput(&logBuf),
	}
	base, stop := context.WithTimeout(context.Background(), timeout)
	alloc, stopAlloc := chromedp.NewExecAllocator(base, opts...)
	tab, stopTab := chromedp.NewContext(alloc)
	if err := chromedp.Do(tab, chromedp.EmulateViewport(1280, 900)); err != nil {
		stopTab()
		stopAlloc()
		stop()
		t.Fatalf("start chromium: %v\n%s", err, logBuf.String())
	}
	t.Cleanup(func() {
		stopTab()
		stopAlloc()
		stop()
		if t.Failed() {
			t.Logf("chromium log:\n%s", tail(logBuf.String(), 4000))
		}
	})
	return tab
}

func tail(s string, n int) string {
	if len(s) > n {
		return "…" + s[len(s)-n:]
	}
	return s
}

// shot writes a screenshot of the tab to $SPARSEWATCH_SHOTS/name.png when
// that variable names a folder; the suite takes none by default.
func shot(t *testing.T, tab context.Context, name string) {
	t.Helper()
	dir := os.Getenv("SPARSEWATCH_SHOTS")
	if dir == "" {
		return
	}
	png, err := chromedp.Run(tab, chromedp.CaptureScreenshot())
	if err != nil {
		t.Logf("screenshot %s: %v", name, err)
		return
	}
	if err := os.MkdirAll(dir, 0o755); err == nil {
		os.WriteFile(filepath.Join(dir, name+".png"), png, 0o644)
	}
}

// poll waits until the JS expression is truthy and returns its value.
func poll[T any](t *testing.T, tab context.Context, what, expr string, timeout time.Duration) T {
	t.Helper()
	v, err := chromedp.Run(tab, chromedp.Poll[T](expr,
		chromedp.WithPollingInterval(50*time.Millisecond), chromedp.WithPollingTimeout(timeout)))
	if err != nil {
		state, _ := chromedp.Run(tab, chromedp.Evaluate[string](`JSON.stringify(document.body.dataset)`))
		t.Fatalf("waiting for %s: %v\npage state: %s", what, err, state)
	}
	return v
}

func eval[T any](t *testing.T, tab context.Context, expr string) T {
	t.Helper()
	v, err := chromedp.Run(tab, chromedp.Evaluate[T](expr))
	if err != nil {
		t.Fatalf("evaluate %s: %v", strings.TrimSpace(expr), err)
	}
	return v
}
