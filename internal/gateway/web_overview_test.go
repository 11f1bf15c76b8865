package gateway

import (
	"context"
	"fmt"
	"net/http"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/chromedp/chromedp"
	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials/insecure"

	"github.com/pulsefleet/pulsefleet/internal/attention"
	"github.com/pulsefleet/pulsefleet/internal/caution"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// browser is a headless Chromium driven by the tests (chromedp): steps with
// a bound, page expressions, screenshots, and every uncaught page exception
// reported as a test error.
type browser struct {
	t     testing.TB
	ctx   context.Context
	shots string
}

const chromiumPath = "/usr/bin/chromium"

func newBrowser(t testing.TB, width, height int) *browser {
	t.Helper()
	if tt, ok := t.(*testing.T); ok {
		requireTool(tt, chromiumPath)
	} else if _, err := os.Stat(chromiumPath); err != nil {
		t.Skipf("%s not installed: %v", chromiumPath, err)
	}
	shots := os.Getenv("PULSEFLEET_SCREENSHOT_DIR")
	if shots == "" {
		shots = t.TempDir()
	}
	ctx, cancel := context.WithTimeout(context.Background(), 10*time.Minute)
	opts := []chromedp.ExecAllocatorOption{
		chromedp.ExecPath(chromiumPath), chromedp.Flag("headless", true), chromedp.NoSandbox,
		chromedp.Flag("disable-gpu", true), chromedp.Flag("disable-quic", true), chromedp.NoFirstRun,
		chromedp.NoDefaultBrowserCheck, chromedp.Flag("disable-background-networking", true),
		chromedp.Flag("disable-component-update", true), chromedp.Flag("disable-sync", true),
		chromedp.Flag("disable-dev-shm-usage", true), chromedp.UserDataDir(t.TempDir()), chromedp.WindowSize(width, height),
	}
	actx, acancel := chromedp.NewExecAllocator(ctx, opts...)
	bctx, bcancel := chromedp.NewContext(actx)
	t.Cleanup(func() { bcancel(); acancel(); cancel() })
	if err := chromedp.Do(bctx); err != nil {
		t.Fatalf("start %s: %v", chromiumPath, err)
	}
	go func() {
		for m, err := range chromedp.Console(bctx) {
			if err != nil {
				return
			}
			if m.IsException() {
				t.Errorf("page exception: %s", m.String())
			}
		}
	}()
	return &browser{t: t, ctx: bctx, shots: shots}
}

func (b *browser) do(what string, steps ...chromedp.Action[chromedp.Void]) {
	b.t.Helper()
	sctx, cancel := context.WithTimeout(b.ctx, 60*time.Second)
	defer cancel()
	if err := chromedp.Do(sctx, steps...); err != nil {
		b.t.Fatalf("%s: %v", what, err)
	}
}

func (b *browser) eval(expr string) string {
	b.t.Helper()
	v, err := chromedp.Run(b.ctx, chromedp.Evaluate[string](expr))
	if err != nil {
		b.t.Fatalf("%s: %v", expr, err)
	}
	return v
}

func (b *browser) shoot(name string) {
	b.t.Helper()
	b.do("settle", chromedp.Sleep(300*time.Millisecond)) // let the last paint finish; nothing is timed
	// The screen as a person sees it (a full-page image of 2,000 rows is
	// larger than Chromium renders).
	png, err := chromedp.Run(b.ctx, chromedp.CaptureScreenshot())
	if err != nil {
		b.t.Fatalf("screenshot %s: %v", name, err)
	}
	if err := os.MkdirAll(b.shots, 0o755); err != nil {
		b.t.Fatal(err)
	}
	if err := os.WriteFile(filepath.Join(b.shots, name), png, 0o644); err != nil {
		b.t.Fatal(err)
	}
}

// waitFor polls a page expression until it is true.
func (b *browser) waitFor(what, expr string) {
	b.t.Helper()
	b.do(what, chromedp.Poll[chromedp.Void](expr, chromedp.WithPollingTimeout(45*time.Second)))
}

// bigFleet connects n quiet ward devices (ward-0000...) that each send a few
// normal seconds ending now, spread over workers and connections. Their
// streams stay open with no reader of their own (the worker reads the
// welcome and the ack), so that 2,000 of them stay within the race
// detector's limit of goroutines.
func bigFleet(t testing.TB, h *harness, n int) {
	t.Helper()
	if err := h.g.SetSecurity(SecurityOptions{DeviceRate: 1e6, DeviceBurst: 1e6, DeviceTimeRate: 1e6, DeviceTimeBurst: 24 * time.Hour}); err != nil {
		t.Fatal(err)
	}
	// A connection carries at most maxStreamsPerConn streams: the fleet
	// spreads over several, as real devices each have their own.
	conns := make([]*grpc.ClientConn, n/(maxStreamsPerConn/2)+1)
	for i := range conns {
		c, err := grpc.NewClient(h.grpcAddr, grpc.WithTransportCredentials(insecure.NewCredentials()))
		if err != nil {
			t.Fatal(err)
		}
		conns[i] = c
		t.Cleanup(func() { c.Close() })
	}
	var wg sync.WaitGroup
	const workers = 16
	end := time.Now().Add(-time.Second).Truncate(time.Second).UnixMilli()
	errs := make(chan error, workers)
	for w := 0; w < workers; w++ {
		wg.Add(1)
		go func(w int) {
			defer wg.Done()
			for i := w; i < n; i += workers {
				in := &pb.Introduction{DeviceId: fmt.Sprintf("ward-%04d", i), Model: "fingertip-proto-s2", Mode: pb.Mode_MODE_SUMMARY,
					Labels: map[string]string{"ward": fmt.Sprintf("w%d", i%12)}}
				if err := quietDevice(t, conns[i%len(conns)], in, end, 95+float64(i%4)); err != nil {
					errs <- err
					return
				}
			}
		}(w)
	}
	wg.Wait()
	close(errs)
	for err := range errs {
		t.Fatal(err)
	}
}

// quietDevice introduces a device on conn, sends three seconds of spo2
// ending at endMS and waits for their ack, reading on the caller's
// goroutine; the stream stays open until the test ends.
func quietDevice(t testing.TB, conn *grpc.ClientConn, in *pb.Introduction, endMS int64, spo2 float64) error {
	ctx, cancel := context.WithCancel(context.Background())
	t.Cleanup(cancel)
	st, err := pb.NewIngestServiceClient(conn).Connect(ctx)
	if err != nil {
		return err
	}
	if err := st.Send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Introduction{Introduction: in}}); err != nil {
		return err
	}
	for s := uint64(1); s <= 3; s++ {
		if err := st.Send(summary(s, endMS-int64(3-s)*1000, spo2)); err != nil {
			return err
		}
	}
	for {
		m, err := st.Recv()
		if err != nil {
			return fmt.Errorf("%s: %w", in.GetDeviceId(), err)
		}
		if r := m.GetRejection(); r != nil {
			return fmt.Errorf("%s: rejected: %v", in.GetDeviceId(), r)
		}
		if m.GetAck().GetThroughSequence() >= 3 {
			return nil
		}
	}
}

// setProfile gives one device its own profile.
func setProfile(t testing.TB, h *harness, id, yaml string) {
	t.Helper()
	if _, err := h.fleet().SetAlarmProfile(context.Background(), &pb.SetAlarmProfileRequest{DeviceId: id, ProfileYaml: yaml, Reason: "web test"}); err != nil {
		t.Fatalf("profile of %s: %v", id, err)
	}
}

func profileYAML(name string, limit float64, latching bool) string {
	return fmt.Sprintf("name: %s\nconditions:\n  - kind: spo2_low\n    limit: %g\n    hysteresis: 2\n    delay: 2s\n    priority: medium\n    latching: %v\n    escalate: {below: 84, priority: high}\n", name, limit, latching)
}

// alarmingDevices adds the devices the overview test looks for, all with
// ids after the ward's so that id order would hide them at the bottom.
func alarmingDevices(t testing.TB, h *harness) {
	t.Helper()
	end := time.Now().Add(-time.Second).Truncate(time.Second).UnixMilli()
	run := func(id string, spo2 []float64, profile string) *testDevice {
		d, _ := h.connect(t, &pb.Introduction{DeviceId: id, Model: "fingertip-proto-s2", Mode: pb.Mode_MODE_SUMMARY, Labels: map[string]string{"ward": "zz"}})
		if profile != "" {
			setProfile(t, h, id, profile)
		}
		for i, v := range spo2 {
			d.send(summary(uint64(i+1), end-int64(len(spo2)-1-i)*1000, v))
		}
		d.waitAck(uint64(len(spo2)))
		return d
	}
	rep := func(v float64, n int) []float64 {
		out := make([]float64, n)
		for i := range out {
			out[i] = v
		}
		return out
	}
	run("zz-high-01", rep(82, 10), "")                                                         // below 85: escalated to high
	run("zz-medium-02", rep(88, 10), "")                                                       // medium, present
	run("zz-latched-03", append(rep(86, 6), rep(96, 5)...), profileYAML("latch-90", 90, true)) // ended, latched
	run("zz-acked-04", rep(87, 10), "")                                                        // acknowledged below
	if _, err := h.fleet().AcknowledgeAlarm(context.Background(), &pb.AcknowledgeAlarmRequest{DeviceId: "zz-acked-04"}); err != nil {
		t.Fatal(err)
	}
	// A connected device whose newest value is 30 minutes old, and one that left.
	d, _ := h.connect(t, &pb.Introduction{DeviceId: "zz-stale-05", Model: "fingertip-proto-s2", Mode: pb.Mode_MODE_SUMMARY})
	d.send(summary(1, end-30*60_000, 98))
	d.waitAck(1)
	gone := run("zz-gone-06", rep(97, 3), "")
	gone.close()
	waitGone(t, h, "zz-gone-06")
	run("zz-prof88-07", rep(95, 3), profileYAML("home-88", 88, false))
	run("zz-prof92-08", rep(95, 3), profileYAML("ward-92", 92, false))
}

// The overview of 2,000+ devices in headless Chromium: alarms first in the
// stated order (checked against internal/attention, the CLI's order),
// shapes and words of the alarm states, stale values muted with their age,
// filters and search kept in the URL, the profile's limit lines, the login
// page, an unknown device's 404, and a 400 px wide screen.
func TestWebOverview2000InChromium(t *testing.T) {
	if testing.Short() {
		t.Skip("2,000 devices and a browser: not in -short")
	}
	h := newHarness(t, func(o *Options) { o.DefaultProfile = webProfile(t) })
	bigFleet(t, h, 2000)
	alarmingDevices(t, h)
	br := newBrowser(t, 1280, 800)
	base := "http://" + h.httpAddr
	const stale = 600 // s: the ward's single values stay current for the test; zz-stale-05's is 30 min old

	br.do("overview", chromedp.Navigate(base+"/?stale="+strconv.Itoa(stale)))
	br.waitFor("2,008 devices", `document.getElementById('count-all') && document.getElementById('count-all').textContent === '2008'`)
	if c := br.eval(`document.getElementById('caution').textContent`); !strings.Contains(c, caution.Text) {
		t.Errorf("caution banner %q", c)
	}

	// The order: the page's against internal/attention over the same devices.
	devs, err := h.fleet().ListDevices(context.Background(), &pb.ListDevicesRequest{})
	if err != nil {
		t.Fatal(err)
	}
	eps, err := h.fleet().ListEpisodes(context.Background(), &pb.ListEpisodesRequest{ActiveOnly: true})
	if err != nil {
		t.Fatal(err)
	}
	ds := devs.GetDevices()
	attention.Order(ds, attention.Announced(eps.GetEpisodes(), nil), time.Now(), stale*time.Second)
	var want []string
	for _, d := range ds[:12] {
		want = append(want, d.GetDeviceId())
	}
	got := br.eval(`pulsefleet.view().slice(0, 12).join(' ')`)
	if got != strings.Join(want, " ") {
		t.Errorf("page order\n %s\nwant (internal/attention)\n %s", got, strings.Join(want, " "))
	}
	if !strings.HasPrefix(got, "zz-high-01 ") {
		t.Errorf("first row %q, want zz-high-01 (the only high priority alarm)", got)
	}
	// ...and it is on the first screen.
	if v := br.eval(`(() => { const r = document.querySelector('#fleet tbody tr.row'); const b = r.getBoundingClientRect();
		return r.dataset.device + ' ' + (b.top >= 0 && b.bottom <= innerHeight) })()`); v != "zz-high-01 true" {
		t.Errorf("first rendered row and whether it is on the first screen: %q", v)
	}
	if n := br.eval(`document.querySelectorAll('#fleet tbody tr.row').length + ''`); n == "" || mustAtoi(t, n) > 200 {
		t.Errorf("%s rows in the document for 2,008 devices, want only a window of them", n)
	}
	if v := br.eval(`['high','medium','low'].map(p => document.getElementById('count-' + p).textContent).join(' ')`); v != "1 2 0" && v != "1 3 0" {
		t.Errorf("counts high medium low %q, want 1 high and the medium ones", v)
	}
	br.shoot("fleet-2000.png")

	// Alarm states by word and shape: present, escalated, latched, acknowledged.
	badge := func(id string) string {
		return br.eval(fmt.Sprintf(`(() => { const b = document.querySelector('#fleet tr[data-device="%s"] .badge');
			return b.dataset.state + '|' + b.textContent + '|' + b.querySelector('svg > *').getAttribute('fill') + '|' + getComputedStyle(b).borderTopStyle })()`, id))
	}
	for id, want := range map[string]string{
		"zz-high-01":    "escalated|HIGHescalated|currentColor|solid",
		"zz-medium-02":  "present|MEDIUMpresent|currentColor|solid",
		"zz-latched-03": "latched|MEDIUMended, not acknowledged|none|double",
		"zz-acked-04":   "acknowledged|MEDIUMacknowledged|currentColor|dashed",
	} {
		if got := badge(id); got != want {
			t.Errorf("%s badge %q, want %q", id, got, want)
		}
	}
	if v := br.eval(`document.querySelector('#fleet tr[data-device="zz-high-01"] .conds').textContent`); v != "SpO2 low" {
		t.Errorf("condition shown as %q, want the label SpO2 low", v)
	}

	// Stale values: muted, struck, with their age; never in the live style.
	br.do("stale filter", chromedp.SetValue(`#f-state`, "novalue"), chromedp.Evaluate[chromedp.Void](`document.getElementById('f-state').dispatchEvent(new Event('change'))`))
	if v := br.eval(`pulsefleet.view().join(' ')`); v != "zz-gone-06 zz-stale-05" {
		t.Errorf("no-current-value filter shows %q, want zz-gone-06 zz-stale-05", v)
	}
	for _, id := range []string{"zz-stale-05", "zz-gone-06"} {
		v := br.eval(fmt.Sprintf(`(() => { const c = document.querySelector('#fleet tr[data-device="%s"] td.v-spo2 .val');
			return c.className + '|' + (c.querySelector('s') ? c.querySelector('s').textContent : '') + '|' + c.textContent })()`, id))
		if !strings.HasPrefix(v, "val stale|") || !strings.Contains(v, " old") {
			t.Errorf("%s SpO2 cell %q, want muted, struck through, with its age", id, v)
		}
	}
	if v := br.eval(`document.querySelector('#fleet tr[data-device="zz-stale-05"] td.v-spo2 .val').textContent`); v != "98, 30 min old" && v != "98, 31 min old" {
		t.Errorf("zz-stale-05 SpO2 %q, want \"98, 30 min old\" (or 31 min by now)", v)
	}
	br.shoot("fleet-stale.png")

	// Filter, search and the URL: a link reproduces the view.
	br.do("priority filter", chromedp.SetValue(`#f-state`, ""), chromedp.Evaluate[chromedp.Void](`document.getElementById('f-state').dispatchEvent(new Event('change'))`),
		chromedp.SetValue(`#f-priority`, "medium"), chromedp.Evaluate[chromedp.Void](`document.getElementById('f-priority').dispatchEvent(new Event('change'))`))
	if v := br.eval(`pulsefleet.view().join(' ')`); !strings.Contains(v, "zz-medium-02") || strings.Contains(v, "zz-high-01") || strings.Contains(v, "ward-") {
		t.Errorf("medium filter shows %q", v)
	}
	br.do("search", chromedp.SetValue(`#f-priority`, ""), chromedp.Evaluate[chromedp.Void](`document.getElementById('f-priority').dispatchEvent(new Event('change'))`),
		chromedp.SendKeys(`#f-q`, "zz-prof"))
	br.waitFor("search applied", `pulsefleet.view().join(' ') === 'zz-prof88-07 zz-prof92-08'`)
	url := br.eval(`location.href`)
	if !strings.Contains(url, "q=zz-prof") || !strings.Contains(url, "stale=600") {
		t.Errorf("URL after the search %q, want q=zz-prof and stale=600", url)
	}
	br.do("label search by link", chromedp.Navigate(base+"/?q=ward%3Dw3&priority=none&order=id&stale=600"))
	br.waitFor("label search", `document.getElementById('count-all') && document.getElementById('count-all').textContent === '2008'`)
	if v := br.eval(`[document.getElementById('f-q').value, document.getElementById('f-priority').value, document.getElementById('f-order').value, pulsefleet.view().length, pulsefleet.view()[0]].join('|')`); v != "ward=w3|none|id|167|ward-0003" {
		t.Errorf("view from the link: %q, want the controls set from the URL and the 167 devices of ward w3 in id order", v)
	}

	// Limit lines follow the device's own profile.
	for id, limit := range map[string]string{"zz-prof88-07": "88", "zz-prof92-08": "92", "ward-0001": "90"} {
		br.do("device page "+id, chromedp.Navigate(base+"/device/"+id),
			chromedp.WaitVisible(`svg.chart[data-chart="spo2"] line.limit[data-condition="spo2_low"]`))
		if v := br.eval(`document.querySelector('svg.chart[data-chart="spo2"] line.limit[data-condition="spo2_low"]').dataset.limit`); v != limit {
			t.Errorf("%s SpO2 limit line at %s, want %s (its profile)", id, v, limit)
		}
	}
	br.do("device page", chromedp.Navigate(base+"/device/zz-latched-03"), chromedp.WaitVisible(`#episodes`), chromedp.WaitVisible(`svg.chart[data-chart="spo2"] path.line`))
	if v := br.eval(`document.querySelector('#alarm .badge').dataset.state + '|' + document.querySelector('#episodes tbody td').textContent`); v != "latched|SpO2 low" {
		t.Errorf("device page alarm state and episode condition %q, want latched|SpO2 low", v)
	}
	br.shoot("device-latched.png")

	// An unknown device: 404 and one message, no empty panels.
	resp, err := http.Get(base + "/device/nobody-here")
	if err != nil {
		t.Fatal(err)
	}
	resp.Body.Close()
	if resp.StatusCode != http.StatusNotFound {
		t.Errorf("unknown device page: HTTP %d, want 404", resp.StatusCode)
	}
	br.do("unknown device", chromedp.Navigate(base+"/device/nobody-here"), chromedp.WaitVisible(`#missing`))
	if v := br.eval(`document.getElementById('missing').textContent + '|' + document.querySelectorAll('.panel').length`); !strings.Contains(v, `No device "nobody-here" is known to this gateway.`) || !strings.HasSuffix(v, "|0") {
		t.Errorf("unknown device page %q, want one message and no panels", v)
	}

	// The login page: styled, with the caution.
	br.do("login page", chromedp.Navigate(base+"/login"), chromedp.WaitVisible(`#token`))
	if v := br.eval(`document.getElementById('caution').textContent.includes(` + strconv.Quote(caution.Text) + `) + '|' + getComputedStyle(document.querySelector('button')).backgroundColor`); v != "true|rgb(30, 36, 44)" {
		t.Errorf("login page caution and button style %q, want the caution and the page's own style", v)
	}
	br.shoot("login.png")

	// 400 px wide: no sideways scrolling, the alarm column fits.
	br.do("phone width", chromedp.EmulateViewport(400, 800), chromedp.Navigate(base+"/?stale=600"))
	br.waitFor("phone overview", `document.getElementById('count-all') && document.getElementById('count-all').textContent === '2008'`)
	if v := br.eval(`(() => { const cells = [...document.querySelectorAll('#fleet td.alarm')];
		const over = cells.filter(c => c.scrollWidth > c.clientWidth + 1 || c.getBoundingClientRect().right > innerWidth + 0.5).length;
		const de = document.documentElement;
		return (de.scrollWidth <= de.clientWidth) + '|' + de.scrollWidth + '|' + cells.length + '|' + over })()`); !strings.HasPrefix(v, "true|") || !strings.HasSuffix(v, "|0") || strings.HasSuffix(v, "|0|0") {
		wide := br.eval(`[...document.querySelectorAll('body, body *')].filter(e => e.scrollWidth > document.documentElement.clientWidth)
			.slice(0, 12).map(e => e.tagName + '.' + e.className + '#' + e.id + ':' + e.scrollWidth + '/' + Math.round(e.getBoundingClientRect().right)).join(' ')`)
		t.Errorf("at 400 px: no sideways scrolling | page scroll width | alarm cells | overflowing ones = %q, want true|...|n|0; beyond the edge: %s", v, wide)
	}
	br.shoot("fleet-phone.png")
	t.Logf("screenshots in %s", br.shots)
}

func mustAtoi(t testing.TB, s string) int {
	t.Helper()
	n, err := strconv.Atoi(s)
	if err != nil {
		t.Fatalf("%q: %v", s, err)
	}
	return n
}
