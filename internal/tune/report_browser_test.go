package tune

import (
	"bytes"
	"context"
	"github.com/pulsefleet/pulsefleet/internal/caution"
	"image/png"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/chromedp/chromedp"
)

const chromiumPath = "/usr/bin/chromium"

// headless starts Debian's chromium (installed by .ci/deps.d/chromium.sh)
// with the network-quiet flags and returns a browser context. Without
// chromium the test fails when PULSEFLEET_REQUIRE_TOOLS is set (CI sets 1;
// any non-empty value counts, as everywhere else) and is skipped otherwise.
func headless(t *testing.T) context.Context {
	t.Helper()
	if _, err := os.Stat(chromiumPath); err != nil {
		if os.Getenv("PULSEFLEET_REQUIRE_TOOLS") != "" {
			t.Fatalf("chromium missing at %s (PULSEFLEET_REQUIRE_TOOLS is set; .ci/deps.d/chromium.sh installs it): %v", chromiumPath, err)
		}
		t.Skipf("chromium missing at %s: %v", chromiumPath, err)
	}
	ctx, cancel := context.WithTimeout(context.Background(), 60*time.Second)
	t.Cleanup(cancel)
	actx, acancel := chromedp.NewExecAllocator(ctx,
		chromedp.ExecPath(chromiumPath),
		chromedp.Flag("headless", true),
		chromedp.NoSandbox,
		chromedp.DisableGPU,
		chromedp.Flag("disable-quic", true),
		chromedp.NoFirstRun,
		chromedp.NoDefaultBrowserCheck,
		chromedp.Flag("disable-background-networking", true),
		chromedp.Flag("disable-component-update", true),
		chromedp.Flag("disable-sync", true),
		chromedp.UserDataDir(t.TempDir()),
	)
	t.Cleanup(acancel)
	bctx, bcancel := chromedp.NewContext(actx)
	t.Cleanup(bcancel)
	return bctx
}

func evalT[T any](t *testing.T, ctx context.Context, js string) T {
	t.Helper()
	v, err := chromedp.Run(ctx, chromedp.Evaluate[T](js))
	if err != nil {
		t.Fatalf("evaluate %s: %v", js, err)
	}
	return v
}

// TestReportInHeadlessChromium opens report.html in a real browser: it must
// render both charts with text, the best-profiles table, the caution, and
// load nothing from outside the file. A screenshot goes to
// $PULSEFLEET_SCREENSHOT_DIR/tune-report.png (or the test's temp dir).
func TestReportInHeadlessChromium(t *testing.T) {
	o := cohortOptions{Devices: 12, Hours: 12, Seed: 42, DipsPerHour: 3, MissingPct: 1}
	if testing.Short() {
		o.Devices, o.Hours = 4, 4
	}
	g, err := ParseGrid([]byte(`
base: adult-ward-pilot
sweep:
  spo2_low.escalate.below: [80]
  spo2_low.limit: [82, 84, 86, 88, 90, 92]
  spo2_low.delay: [0s, 15s, 30s, 60s, 120s]
reference:
  rule: {below: 85, for: 60s}
`), ".")
	if err != nil {
		t.Fatal(err)
	}
	res, err := Run(context.Background(), g, cohort(o), Options{})
	if err != nil {
		t.Fatal(err)
	}
	out := t.TempDir()
	if err := WriteOutputs(out, res, ReportInfo{Source: "generated cohort (invented ward 7, demo data)"}); err != nil {
		t.Fatal(err)
	}
	ctx := headless(t)
	if _, err := chromedp.Run(ctx, chromedp.EmulateViewport(1100, 2050)); err != nil {
		t.Fatal(err)
	}
	if _, err := chromedp.Run(ctx, chromedp.Navigate("file://"+filepath.Join(out, "report.html"))); err != nil {
		t.Fatal(err)
	}
	if n := evalT[int](t, ctx, `document.querySelectorAll("svg").length`); n != 2 {
		t.Errorf("%d charts, want 2 (frontier, alarms against limit)", n)
	}
	if n := evalT[int](t, ctx, `document.querySelectorAll("svg circle").length`); n < len(res.Points) {
		t.Errorf("%d circles, want at least one per grid point (%d)", n, len(res.Points))
	}
	if w := evalT[float64](t, ctx, `document.querySelector("svg text").getBBox().width`); !(w > 0) {
		t.Errorf("chart title has width %v: text not rendered", w)
	}
	body := evalT[string](t, ctx, `document.body.innerText`)
	for _, want := range []string{caution.Text, "clinical team's decision", "Best profiles", "Exact settings used", "Matching rule"} {
		if !strings.Contains(body, want) {
			t.Errorf("report lacks %q", want)
		}
	}
	best := len(BestRows(res))
	if n := evalT[int](t, ctx, `document.querySelectorAll("table")[0].rows.length - 1`); n != best {
		t.Errorf("best-profiles table has %d rows, want the %d Pareto-optimal profiles", n, best)
	}
	if n := evalT[int](t, ctx, `performance.getEntriesByType("resource").length`); n != 0 {
		t.Errorf("report loaded %d resources, want none (self-contained)", n)
	}
	shot, err := chromedp.Run(ctx, chromedp.CaptureScreenshot())
	if err != nil {
		t.Fatal(err)
	}
	img, err := png.Decode(bytes.NewReader(shot))
	if err != nil {
		t.Fatalf("screenshot is not a PNG: %v", err)
	}
	if b := img.Bounds(); b.Dx() != 1100 {
		t.Errorf("screenshot %v, want 1100 px wide", b)
	}
	dir := os.Getenv("PULSEFLEET_SCREENSHOT_DIR")
	if dir == "" {
		dir = t.TempDir()
	}
	if err := os.MkdirAll(dir, 0o755); err != nil {
		t.Fatal(err)
	}
	path := filepath.Join(dir, "tune-report.png")
	if err := os.WriteFile(path, shot, 0o644); err != nil {
		t.Fatal(err)
	}
	t.Logf("screenshot: %s", path)
}
