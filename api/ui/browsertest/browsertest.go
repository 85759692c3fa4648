// Package browsertest starts a real headless Chromium for tests of the
// pages, through the DevTools protocol. A test that needs it fails under
// CI=true when Chromium is missing (the test command installs Debian's
// chromium as root) and is skipped otherwise.
package browsertest

import (
	"context"
	"os"
	"os/exec"
	"path/filepath"
	"testing"
	"time"

	"github.com/chromedp/chromedp"
)

// ExecPath finds Chromium, or fails (CI=true) or skips the test.
func ExecPath(t testing.TB) string {
	t.Helper()
	for _, name := range []string{"chromium", "chromium-browser", "google-chrome", "headless-shell"} {
		if p, err := exec.LookPath(name); err == nil {
			return p
		}
	}
	if os.Getenv("CI") == "true" {
		t.Fatal("chromium is required under CI=true (./.ci/test installs Debian's chromium as root)")
	}
	t.Skip("chromium not installed; ./.ci/test installs it as root")
	return ""
}

// New starts a headless browser and returns a tab's context; it is closed
// when the test ends. ignoreCert accepts the test's own TLS certificates.
func New(t testing.TB, ignoreCert bool) context.Context {
	t.Helper()
	opts := []chromedp.ExecAllocatorOption{
		chromedp.ExecPath(ExecPath(t)),
		chromedp.Headless,
		chromedp.NoSandbox,
		chromedp.DisableGPU,
		chromedp.NoFirstRun,
		chromedp.NoDefaultBrowserCheck,
		chromedp.Flag("disable-background-networking", true),
		chromedp.Flag("disable-component-update", true),
		chromedp.Flag("disable-dev-shm-usage", true),
		chromedp.Flag("hide-scrollbars", true),
		chromedp.UserDataDir(t.TempDir()),
		chromedp.WindowSize(1100, 900),
	}
	if ignoreCert {
		opts = append(opts, chromedp.IgnoreCertErrors)
	}
	actx, cancelAlloc := chromedp.NewExecAllocator(context.Background(), opts...)
	ctx, cancel := chromedp.NewContext(actx)
	ctx, cancelTimeout := context.WithTimeout(ctx, 3*time.Minute)
	t.Cleanup(func() {
		cancelTimeout()
		cancel()
		cancelAlloc()
	})
	// Start the browser now, so a failure to launch is reported here.
	if err := chromedp.Do(ctx); err != nil {
		t.Fatalf("start chromium: %v", err)
	}
	return ctx
}

// Save writes a screenshot under dir, creating it.
func Save(t testing.TB, dir, name string, png []byte) {
	t.Helper()
	if err := os.MkdirAll(dir, 0o755); err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(filepath.Join(dir, name), png, 0o644); err != nil {
		t.Fatal(err)
	}
}
