package main

import (
	"context"
	"os"
	"testing"
	"time"

	"github.com/chromedp/chromedp"
)

// pageBrowser starts Debian's headless Chromium for a page test (it fails
// when PULSEFLEET_REQUIRE_TOOLS is set and the browser is missing, else
// skips). It returns the browser's context, which lives until the test ends,
// and do, which runs steps within a bound (not a wait: under load a step can
// take tens of seconds) and fails the test naming what did not happen.
func pageBrowser(t *testing.T, width, height int) (context.Context, func(what string, steps ...chromedp.Action[chromedp.Void])) {
	t.Helper()
	const chromium = "/usr/bin/chromium"
	if _, err := os.Stat(chromium); err != nil {
		if os.Getenv("PULSEFLEET_REQUIRE_TOOLS") != "" {
			t.Fatalf("%s is required (PULSEFLEET_REQUIRE_TOOLS is set): %v; run .ci/deps.d/chromium.sh", chromium, err)
		}
		t.Skipf("%s not installed: %v", chromium, err)
	}
	ctx, cancel := context.WithTimeout(context.Background(), 4*time.Minute)
	t.Cleanup(cancel)
	actx, acancel := chromedp.NewExecAllocator(ctx, chromedp.ExecPath(chromium), chromedp.Flag("headless", true), chromedp.NoSandbox,
		chromedp.Flag("disable-gpu", true), chromedp.NoFirstRun, chromedp.NoDefaultBrowserCheck,
		chromedp.Flag("disable-background-networking", true), chromedp.Flag("disable-component-update", true),
		chromedp.Flag("disable-sync", true), chromedp.Flag("disable-dev-shm-usage", true),
		chromedp.UserDataDir(t.TempDir()), chromedp.WindowSize(width, height))
	t.Cleanup(acancel)
	bctx, bcancel := chromedp.NewContext(actx)
	t.Cleanup(bcancel)
	if err := chromedp.Do(bctx); err != nil {
		t.Fatalf("start %s: %v", chromium, err)
	}
	do := func(what string, steps ...chromedp.Action[chromedp.Void]) {
		t.Helper()
		sctx, cancel := context.WithTimeout(bctx, time.Minute)
		defer cancel()
		if err := chromedp.Do(sctx, steps...); err != nil {
			t.Fatalf("%s: %v", what, err)
		}
	}
	return bctx, do
}
