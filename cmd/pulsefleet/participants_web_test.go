package main

import (
	"encoding/json"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/chromedp/chromedp"
)

// The enrolment round trip through the device page in a real headless
// Chromium: the operator enrols the device to a participant with a note;
// the CLI reads it back (participants list, devices --format json) and the
// audit log holds it. A second enrolment while the first is open is refused
// and the page shows the gateway's message naming both intervals; a name
// instead of a code shows the rule. Ending from the page closes the
// interval (list and audit), and the page says deletion is CLI-only.
func TestEnrolThroughThePageInChromium(t *testing.T) {
	rg := startEpisodeGatewayRG(t, "ward-p-01")
	bctx, do := pageBrowser(t, 1280, 1200)
	text := func(sel string) string {
		t.Helper()
		v, err := chromedp.Run(bctx, chromedp.Evaluate[string](`(document.querySelector('`+sel+`') || {}).textContent || ''`))
		if err != nil {
			t.Fatalf("read %s: %v", sel, err)
		}
		return v
	}
	// waitText waits until sel's text contains want (the page's answer).
	waitText := func(what, sel, want string) {
		t.Helper()
		do(what, chromedp.Poll[chromedp.Void](`(document.querySelector('`+sel+`') || {textContent: ''}).textContent.includes(`+jsString(want)+`)`,
			chromedp.WithPollingTimeout(15*time.Second)))
	}
	gw := []string{"--gateway", rg.GRPCAddr}
	cli := func(args ...string) string {
		t.Helper()
		code, out, errs := runCmd(append(args, gw...)...)
		if code != 0 {
			t.Fatalf("%v: exit %d: %s", args, code, errs)
		}
		return out
	}

	do("device page", chromedp.Navigate("http://"+rg.HTTPAddr+"/device/ward-p-01"), chromedp.WaitVisible(`#enrol-save`))
	if got := text(`#enrol-current`); !strings.Contains(got, "Not enrolled") {
		t.Errorf("before enrolment the panel says %q", got)
	}
	if got := text(`#participant`); !strings.Contains(got, "CLI only") || !strings.Contains(got, "participants delete --participant PID --confirm") {
		t.Errorf("the panel does not say that deletion is CLI-only:\n%s", got)
	}
	// Enrolled from 10 minutes ago (the from field takes the browser's local time).
	fromMS, err := chromedp.Run(bctx, chromedp.Evaluate[float64](`(() => {
		const d = new Date(Math.floor(Date.now() / 1000) * 1000 - 600000), p = n => String(n).padStart(2, '0');
		document.getElementById('enrol-from').value = d.getFullYear() + '-' + p(d.getMonth() + 1) + '-' + p(d.getDate()) + 'T' + p(d.getHours()) + ':' + p(d.getMinutes()) + ':' + p(d.getSeconds());
		return d.getTime(); })()`))
	if err != nil {
		t.Fatal(err)
	}
	do("enrol", chromedp.SendKeys(`#enrol-participant`, "P-0007"), chromedp.SendKeys(`#enrol-note`, "bed 7"), chromedp.Click(`#enrol-save`))
	waitText("enrolled", `#enrol-current`, "Enrolled to P-0007")
	if out := cli("participants", "list", "--format", "json"); !strings.Contains(out, strconv.FormatInt(int64(fromMS), 10)) {
		t.Errorf("enrolment from the page's from field: want from %d ms in\n%s", int64(fromMS), out)
	}
	if got := text(`#enrolments tbody`); !strings.Contains(got, "P-0007") || !strings.Contains(got, "open") || !strings.Contains(got, "bed 7") || !strings.Contains(got, "web@127.0.0.1") {
		t.Errorf("history after enrolment: %q", got)
	}
	if dir := os.Getenv("PULSEFLEET_SCREENSHOT_DIR"); dir != "" { // PULSEFLEET_SCREENSHOT_DIR=DIR keeps a picture of the panel
		png, err := chromedp.Run(bctx, chromedp.FullScreenshot(100))
		if err == nil {
			err = os.WriteFile(filepath.Join(dir, "participant-panel.png"), png, 0o644)
		}
		if err != nil {
			t.Errorf("screenshot: %v", err)
		}
	}

	if out := cli("participants", "list", "--format", "csv"); strings.Count(out, "\n") != 2 || !strings.Contains(out, "P-0007,ward-p-01,") || !strings.Contains(out, ",bed 7,") {
		t.Errorf("participants list after the page's enrolment:\n%s", out)
	}
	var devs []map[string]any
	if err := json.Unmarshal([]byte(cli("devices", "--format", "json")), &devs); err != nil {
		t.Fatalf("devices --format json: %v", err)
	}
	if len(devs) != 1 || devs[0]["deviceId"] != "ward-p-01" || devs[0]["participant"] != "P-0007" {
		t.Errorf("devices --format json: %v, want ward-p-01 with participant P-0007", devs)
	}
	if out := cli("audit", "--action", "participants.enrol"); !strings.Contains(out, "web@127.0.0.1") || !strings.Contains(out, "participant P-0007 on device ward-p-01") {
		t.Errorf("audit after the page's enrolment:\n%s", out)
	}

	// Overlap: P-0008 from now while P-0007's enrolment is open.
	do("overlap", chromedp.SendKeys(`#enrol-participant`, "P-0008"), chromedp.Click(`#enrol-save`))
	waitText("overlap refused", `#enrol-status.error`, "already enrolled to P-0007")
	if got := text(`#enrol-status`); !strings.Contains(got, "overlaps") || strings.Count(got, "Z..open") != 2 {
		t.Errorf("the overlap message does not name both intervals: %q", got)
	}
	// A name instead of a study code: the rule is named.
	do("name", chromedp.Evaluate[chromedp.Void](`document.getElementById('enrol-participant').value = ''`), chromedp.SendKeys(`#enrol-participant`, "MARIA"), chromedp.Click(`#enrol-save`))
	waitText("name refused", `#enrol-status.error`, "digit")
	if out := cli("participants", "list", "--format", "csv"); strings.Count(out, "\n") != 2 || strings.Contains(out, "P-0008") || strings.Contains(out, "MARIA") {
		t.Errorf("a refused enrolment was stored:\n%s", out)
	}

	do("end", chromedp.Click(`#enrol-end`))
	waitText("ended", `#enrol-current`, "Not enrolled")
	if out := cli("participants", "list", "--format", "json"); !strings.Contains(out, `"toUnixMs"`) && !strings.Contains(out, `"to_unix_ms"`) {
		t.Errorf("list after ending from the page has no end time:\n%s", out)
	}
	if out := cli("audit", "--action", "participants.end"); !strings.Contains(out, "web@127.0.0.1") || !strings.Contains(out, "participant P-0007 on device ward-p-01: enrolment ended") {
		t.Errorf("audit after ending from the page:\n%s", out)
	}
}

// jsString quotes s as a JavaScript string literal.
func jsString(s string) string {
	b, _ := json.Marshal(s)
	return string(b)
}
