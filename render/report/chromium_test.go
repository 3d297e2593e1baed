package report

import (
	"bytes"
	"context"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"strings"
	"testing"
	"time"
)

const chromiumPath = "/usr/bin/chromium"

// chromium runs headless Chromium on a local file with networking,
// updates and sync off and a throw-away profile, and returns its stdout
// and stderr.
func chromium(t *testing.T, extra ...string) (stdout, stderr string) {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), 120*time.Second)
	defer cancel()
	args := []string{"--headless", "--no-sandbox", "--disable-gpu", "--disable-dev-shm-usage", "--disable-quic", "--no-first-run",
		"--disable-background-networking", "--disable-component-update", "--disable-sync",
		"--user-data-dir=" + t.TempDir(), "--enable-logging=stderr", "--v=0",
		// Let the page's load handler finish before the DOM is dumped or
		// the screenshot taken, however slow the machine: virtual time
		// advances only when the page is idle.
		"--virtual-time-budget=10000"}
	cmd := exec.CommandContext(ctx, chromiumPath, append(args, extra...)...)
	var o, e bytes.Buffer
	cmd.Stdout, cmd.Stderr = &o, &e
	if err := cmd.Run(); err != nil {
		t.Fatalf("chromium %v: %v\n%s", extra, err, e.String())
	}
	return o.String(), e.String()
}

// consoleLine matches the renderer's console messages in Chromium's log,
// e.g. `INFO:CONSOLE(12)] "Uncaught ReferenceError: ...", source: ...` or
// `:CONSOLE:12] ...` in newer builds. The page logs nothing itself, so any
// console message (a script error, an image that failed to load) is a
// failure.
var consoleLine = regexp.MustCompile(`(?m)^.*CONSOLE[(:].*$`)

// TestHTMLInChromium loads the synthetic report in headless Chromium: the
// DOM after scripts run must carry the table, every gallery picture, the
// plots and the marker the sorting script sets when it finished without an
// exception; the log must hold no console message. It also saves a
// screenshot (kept under HEEDMAP_SCREENSHOT_DIR when set) for a human look.
func TestHTMLInChromium(t *testing.T) {
	if _, err := os.Stat(chromiumPath); err != nil {
		t.Skipf("headless Chromium not installed at %s (Debian package chromium); skipping the browser check", chromiumPath)
	}
	dir := t.TempDir()
	r := syntheticReport(t, dir)
	if err := WriteAll(dir, r); err != nil {
		t.Fatal(err)
	}
	url := "file://" + filepath.Join(dir, "report.html")

	dom, log := chromium(t, "--dump-dom", url)
	if m := consoleLine.FindAllString(log, -1); len(m) > 0 {
		t.Errorf("console messages while loading the report:\n%s", strings.Join(m, "\n"))
	}
	if !strings.Contains(dom, `data-images-missing="0"`) {
		t.Error("the page reports missing pictures (or its load handler did not run)")
	}
	if !strings.Contains(dom, `data-ready="1"`) {
		t.Error("the page script did not finish (no data-ready marker in the DOM)")
	}
	if !strings.Contains(dom, `id="image-table"`) || strings.Count(dom, "<tr") < 14 {
		t.Error("image table missing from the DOM")
	}
	if got := strings.Count(dom, `<img src="panels/`); got != 14 {
		t.Errorf("%d gallery pictures in the DOM, want 14", got)
	}
	if got := strings.Count(dom, "<svg"); got != 3 {
		t.Errorf("%d inline plots, want 3", got)
	}
	if strings.Contains(dom, "<script>alert") || strings.Count(dom, "<script") != 1 {
		t.Error("hostile string became markup")
	}
	// The hostile id is on the page as text (the browser's DOM keeps it
	// escaped in serialisation).
	if !strings.Contains(dom, "&lt;script&gt;alert(1)&lt;/script&gt;") {
		t.Error("the hostile image id is not shown as text")
	}

	// Negative control: with one panel deleted the page must notice.
	if err := os.Remove(filepath.Join(dir, "panels", "panelc.png")); err != nil {
		t.Fatal(err)
	}
	dom, _ = chromium(t, "--dump-dom", url)
	if !strings.Contains(dom, `data-images-missing="1"`) || !strings.Contains(dom, "picture not found: panels/panelc.png") {
		t.Error("a missing picture went unnoticed")
	}
	writePanel(t, filepath.Join(dir, "panels", "panelc.png"), 2)

	shot := filepath.Join(dir, "report.png")
	if keep := os.Getenv("HEEDMAP_SCREENSHOT_DIR"); keep != "" {
		shot = filepath.Join(keep, "report.png")
	}
	size := "1600,1200"
	if h := os.Getenv("HEEDMAP_SCREENSHOT_HEIGHT"); h != "" { // a taller shot to review the whole page
		size = "1600," + h
	}
	_, log = chromium(t, "--screenshot="+shot, "--window-size="+size, "--hide-scrollbars", url)
	if m := consoleLine.FindAllString(log, -1); len(m) > 0 {
		t.Errorf("console messages while taking the screenshot:\n%s", strings.Join(m, "\n"))
	}
	if fi, err := os.Stat(shot); err != nil || fi.Size() < 10000 {
		t.Errorf("screenshot %s: %v", shot, err)
	}
}
