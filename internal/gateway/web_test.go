package gateway

import (
	"bufio"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"math"
	"net/http"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/caution"

	"github.com/chromedp/chromedp"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/internal/ppgmodel"
	"github.com/pulsefleet/pulsefleet/internal/store"
	"github.com/pulsefleet/pulsefleet/internal/web"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// webProfile announces spo2_low after 2 s (medium), escalating below 85 %
// (high), and pulse_high after 2 s (low): fast enough for a test. The
// numbers are made up for the test, not advice.
func webProfile(t testing.TB) *alarms.Profile {
	p, err := alarms.ParseProfile([]byte(`name: web-test-fast
conditions:
  - kind: spo2_low
    limit: 90
    hysteresis: 2
    delay: 2s
    priority: medium
    escalate: {below: 85, priority: high}
  - kind: pulse_high
    limit: 130
    hysteresis: 5
    delay: 2s
    priority: low
`))
	if err != nil {
		t.Fatal(err)
	}
	return p
}

// fleetPlan is one invented device of the test ward: its SpO2 and pulse at
// minute m of the history streamed in (nil = no value).
type fleetPlan struct {
	id     string
	labels map[string]string
	spo2   func(m float64) float64
	pulse  func(m float64) float64
	leave  bool // disconnects after streaming its history
}

// shiftClock is the wall clock moved back by a shift the test sets.
type shiftClock struct {
	mu    sync.Mutex
	shift time.Duration
}

func (c *shiftClock) Now() time.Time {
	c.mu.Lock()
	defer c.mu.Unlock()
	return time.Now().Add(-c.shift)
}
func (c *shiftClock) set(d time.Duration) { c.mu.Lock(); c.shift = d; c.mu.Unlock() }

// newWebHarness runs a gateway with the fast profile, raw capture, and a
// clock the fleet set-up can move back.
func newWebHarness(t *testing.T) (*harness, *shiftClock) {
	clk := &shiftClock{}
	h := newHarness(t, func(o *Options) {
		o.DefaultProfile, o.CaptureRaw, o.Now = webProfile(t), true, clk.Now
	})
	return h, clk
}

// webFleet sets up an invented ward: devices that connected 6 hours ago (by
// the gateway clock) and stream their last 30 minutes of one-per-second
// summaries (time-compressed, as after an outage), plus 3 minutes of a raw
// prototype; one home device streamed until 20 minutes ago and left.
// Streams stay open; it returns them by id.
func webFleet(t *testing.T, h *harness, clk *shiftClock) map[string]*testDevice {
	const minutes = 30
	// The history arrives time-compressed, like a device catching up after
	// a long outage: lift the per-stream message rate limit.
	if err := h.g.SetSecurity(SecurityOptions{DeviceRate: 1e6, DeviceBurst: 1e6, DeviceTimeRate: 1e6, DeviceTimeBurst: 24 * time.Hour}); err != nil {
		t.Fatal(err)
	}
	end := time.Now().Add(-2 * time.Second).Truncate(time.Second)
	base := end.Add(-minutes * time.Minute).UnixMilli()
	wave := func(m, period float64) float64 { return math.Sin(2 * math.Pi * m / period) }
	plans := []fleetPlan{
		{id: "larkspur-bed-01", labels: map[string]string{"room": "L1"},
			spo2: func(m float64) float64 { // a desaturation over the last four minutes, to 83 %
				if m > 26 {
					return math.Max(83, 95-4*(m-26)*1.2)
				}
				return 95 + wave(m, 7)
			}, pulse: func(m float64) float64 { return 82 + 4*wave(m, 11) }},
		{id: "larkspur-bed-02", labels: map[string]string{"room": "L1"},
			spo2: func(m float64) float64 { return 97 + 0.8*wave(m, 5) }, pulse: func(m float64) float64 { return 68 + 3*wave(m, 9) }},
		{id: "larkspur-bed-03", labels: map[string]string{"room": "L2"},
			spo2: func(m float64) float64 { // drifts down to 88 % and stays
				return math.Max(88, 94-0.4*m)
			}, pulse: func(m float64) float64 { return 75 + 2*wave(m, 6) }},
		{id: "larkspur-bed-04", labels: map[string]string{"room": "L2"},
			spo2: func(m float64) float64 { return 96 + 0.5*wave(m, 4) }, pulse: func(m float64) float64 { return 118 + 22*math.Min(1, m/20) }},
		{id: "home-fern-07", labels: map[string]string{"site": "home"}, leave: true,
			spo2: func(m float64) float64 { return 96 + wave(m, 13) }, pulse: func(m float64) float64 { return 64 + 2*wave(m, 8) }},
	}
	// Connect everyone "6 hours ago".
	clk.set(6 * time.Hour)
	open := map[string]*testDevice{}
	for i, p := range plans {
		in := &pb.Introduction{DeviceId: p.id, Model: "fingertip-proto-s2", Firmware: "0.9.3", Mode: pb.Mode_MODE_SUMMARY, Labels: p.labels}
		open[p.id], _ = h.connect(t, in)
		open[p.id].send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Status{Status: &pb.DeviceStatus{BatteryPct: float64(92 - 9*i), TemperatureC: 31}}})
	}
	raw := rawIntro("proto-raw-01", 16)
	raw.Labels = map[string]string{"bench": "lab-2"}
	raw.Model, raw.Firmware, raw.RedWavelengthNm, raw.IrWavelengthNm = "breadboard-r1", "0.2.0", 660, 940
	open["proto-raw-01"], _ = h.connect(t, raw)

	stream := func(p fleetPlan, d *testDevice, base int64) {
		n := uint64(minutes * 60)
		ph := float64(len(p.id) + int(p.id[len(p.id)-1]))
		for s := uint64(1); s <= n; s++ {
			m := float64(s) / 60
			spo2, pulse := math.Round(p.spo2(m)*10)/10, math.Round(p.pulse(m))
			q, pi := 0.82+0.12*math.Sin(float64(s)/50+ph), 1.6+0.6*math.Sin(float64(s)/90+ph)+0.1*ph/10
			d.send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Summary{Summary: &pb.Summary{Sequence: s, DeviceTimeUnixMs: base + int64(s)*1000,
				Spo2Pct: &spo2, PulseBpm: &pulse, Quality: &q, PiPct: &pi}}})
		}
		d.waitAck(n)
	}
	// The home device streamed until 20 minutes ago and left.
	clk.set(20 * time.Minute)
	for _, p := range plans {
		if p.leave {
			stream(p, open[p.id], base-(20*time.Minute).Milliseconds())
			open[p.id].close()
			waitGone(t, h, p.id)
			delete(open, p.id)
		}
	}
	// The others stream their last 30 minutes now, by the wall clock.
	clk.set(0)
	var wg sync.WaitGroup
	for _, p := range plans {
		if p.leave {
			continue
		}
		wg.Add(1)
		go func(p fleetPlan, d *testDevice) {
			defer wg.Done()
			stream(p, d, base)
		}(p, open[p.id])
	}
	// The raw prototype: 3 minutes at 100 Hz in 25-sample chunks.
	wg.Add(1)
	go func(d *testDevice) {
		defer wg.Done()
		const rate, chunk, secs = 100, 25, 180
		src := ppgmodel.New(ppgmodel.Config{SampleRateHz: rate, ADCBits: 16, Seed: 3})
		v := ppgmodel.DefaultVitals()
		v.SpO2Pct, v.PulseBPM, v.PIPct = 96, 71, 2.5
		red, ir := make([]float64, chunk), make([]float64, chunk)
		rb := end.Add(-secs * time.Second).UnixMilli()
		n := uint64(rate * secs / chunk)
		for i := uint64(0); i < n; i++ {
			src.Fill(red, ir, nil, v)
			c := &pb.RawChunk{Sequence: i + 1, DeviceTimeUnixMs: rb + int64(i)*chunk*1000/rate, SampleRateHz: rate}
			for j := range red {
				c.Red, c.Ir = append(c.Red, uint32(red[j])), append(c.Ir, uint32(ir[j]))
			}
			d.send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_RawChunk{RawChunk: c}})
		}
		d.waitAck(n)
	}(open["proto-raw-01"])
	wg.Wait()

	return open
}

// connected reports whether the device has an open stream (FleetService).
func connected(h *harness, id string) bool {
	r, err := h.g.GetDevice(context.Background(), &pb.GetDeviceRequest{DeviceId: id})
	return err != nil || r.GetDevice().GetConnected()
}

// waitGone waits (bounded) until the gateway has closed the device's stream.
func waitGone(t testing.TB, h *harness, id string) {
	t.Helper()
	deadline := time.Now().Add(10 * time.Second)
	for {
		if !connected(h, id) {
			return
		}
		if time.Now().After(deadline) {
			t.Fatalf("%s still connected", id)
		}
		time.Sleep(5 * time.Millisecond)
	}
}

func webGet(t *testing.T, url string, v any) int {
	t.Helper()
	resp, err := http.Get(url)
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	if v != nil {
		if err := json.NewDecoder(resp.Body).Decode(v); err != nil {
			t.Fatalf("%s: %v", url, err)
		}
	}
	return resp.StatusCode
}

func webPost(t *testing.T, url, ctype, origin, body string) (int, string) {
	t.Helper()
	req, err := http.NewRequest(http.MethodPost, url, strings.NewReader(body))
	if err != nil {
		t.Fatal(err)
	}
	if ctype != "" {
		req.Header.Set("Content-Type", ctype)
	}
	if origin != "" {
		req.Header.Set("Origin", origin)
	}
	resp, err := http.DefaultClient.Do(req)
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	b, _ := io.ReadAll(resp.Body)
	return resp.StatusCode, string(b)
}

// The page's JSON: the fleet with alarms and sparklines, a device with its
// quality and episodes, the trend and raw excerpt; acknowledgement through
// the same path as FleetService (audited), with bad requests named.
func TestWebJSON(t *testing.T) {
	h, clk := newWebHarness(t)
	webFleet(t, h, clk)
	base := "http://" + h.httpAddr

	var fleet web.FleetJSON
	if c := webGet(t, base+"/api/fleet", &fleet); c != 200 {
		t.Fatalf("fleet: %d", c)
	}
	byID := map[string]web.FleetEntryJSON{}
	for _, d := range fleet.Devices {
		byID[d.Device.M.GetDeviceId()] = d
	}
	if len(byID) != 6 {
		t.Fatalf("fleet lists %d devices, want 6", len(byID))
	}
	pr := func(id string) pb.Priority { return byID[id].Device.M.GetAlarmPriority() }
	if d := byID["larkspur-bed-01"]; pr("larkspur-bed-01") != pb.Priority_PRIORITY_HIGH || len(d.Active) == 0 || d.Spark == nil || len(d.Spark.SpO2) < 25 {
		t.Errorf("larkspur-bed-01: priority %v, %d active episodes, spark %+v; want high, >0, ~30 points", pr("larkspur-bed-01"), len(d.Active), d.Spark)
	}
	if d := byID["larkspur-bed-01"]; len(d.SpO2Limits) != 1 || d.SpO2Limits[0].Limit != 90 || d.SpO2Limits[0].ClearAt != 92 {
		t.Errorf("larkspur-bed-01 SpO2 limits %+v, want the profile's 90 %% clearing at 92 %%", d.SpO2Limits)
	}
	if p := pr("larkspur-bed-03"); p != pb.Priority_PRIORITY_MEDIUM {
		t.Errorf("larkspur-bed-03 priority %v, want medium (SpO2 88 %% < 90 %%)", p)
	}
	if p := pr("larkspur-bed-04"); p != pb.Priority_PRIORITY_LOW {
		t.Errorf("larkspur-bed-04 priority %v, want low (pulse 140 > 130)", p)
	}
	if d := byID["home-fern-07"].Device.M; d.GetConnected() || d.GetAlarmPriority() != pb.Priority_PRIORITY_UNSPECIFIED {
		t.Errorf("home-fern-07: connected %v priority %v, want offline without alarm", d.GetConnected(), d.GetAlarmPriority())
	}
	if q := byID["larkspur-bed-02"].Quality.M; q.GetUptime_1H() != 1 || q.GetUptime_1HWindowS() <= 0 {
		t.Errorf("larkspur-bed-02 uptime 1 h %v over %v s, want 1 over the time since first seen", q.GetUptime_1H(), q.GetUptime_1HWindowS())
	}
	if fleet.Caution != caution.Text { // docs/contracts.md, "The caution on every output"
		t.Errorf("caution %q, want the project's caution text", fleet.Caution)
	}
	if fleet.Labels["spo2_low"] != "SpO2 low" || fleet.Labels["pulse_high"] != alarms.Label("pulse_high") {
		t.Errorf("condition labels %v, want alarms.Label's", fleet.Labels)
	}
	// protojson with the .proto names: 64-bit integers as strings.
	var rawFleet map[string]any
	webGet(t, base+"/api/fleet?spark=0", &rawFleet)
	d0 := rawFleet["devices"].([]any)[0].(map[string]any)
	if dev := d0["device"].(map[string]any); dev["device_id"] == nil || fmt.Sprintf("%T", dev["last_seen_unix_ms"]) != "string" || d0["spark"] != nil {
		t.Errorf("device JSON %v (spark %v): want .proto names, int64 as strings, no spark with spark=0", dev, d0["spark"])
	}

	var dev web.DeviceJSON
	webGet(t, base+"/api/device/larkspur-bed-01", &dev)
	if q := dev.Quality.M; q.GetSessions() != 1 || q.GetChunksAccepted() != 1800 || math.Abs(q.GetValidSpo2Share()-1) > 1e-9 {
		t.Errorf("quality %v, want 1 session, 1800 accepted, all valid", q)
	}
	if len(dev.Episodes) == 0 || dev.Episodes[0].M.GetCondition() != "spo2_low" || dev.Episodes[0].M.GetAreaBelowLimitPctS() <= 0 {
		t.Fatalf("episodes %v, want spo2_low with an area below the limit", dev.Episodes)
	}
	if dev.Profile == nil || dev.Profile.Name != "web-test-fast" || len(dev.Profile.Limits) != 2 {
		t.Errorf("profile %+v, want web-test-fast with its SpO2 and pulse limits", dev.Profile)
	}
	var trend web.TrendJSON
	webGet(t, base+"/api/device/larkspur-bed-01/trend?minutes=30&step_s=60", &trend)
	if trend.StepS != 60 || len(trend.Trend.M.GetBuckets()) < 29 {
		t.Errorf("trend: step %d, %d buckets; want 60 s and 30", trend.StepS, len(trend.Trend.M.GetBuckets()))
	}
	var raw struct {
		Captured bool     `json:"captured"`
		RateHz   float64  `json:"rate_hz"`
		Red      []uint32 `json:"red"`
	}
	webGet(t, base+"/api/device/proto-raw-01/raw?seconds=4", &raw)
	if !raw.Captured || raw.RateHz != 100 || len(raw.Red) != 400 {
		t.Errorf("raw excerpt: captured %v, %v Hz, %d samples; want 4 s at 100 Hz", raw.Captured, raw.RateHz, len(raw.Red))
	}

	for _, c := range []struct {
		name, path string
		code       int
		errHas     string
	}{
		{"unknown device", "/api/device/nobody-here", 404, "device_id"},
		{"minutes out of range", "/api/device/larkspur-bed-01/trend?minutes=0", 400, "minutes"},
		{"too many buckets", "/api/device/larkspur-bed-01/trend?minutes=10080&step_s=1", 400, "step_s"},
		{"raw seconds out of range", "/api/device/proto-raw-01/raw?seconds=99", 400, "seconds"},
	} {
		var e map[string]string
		if code := webGet(t, base+c.path, &e); code != c.code || !strings.Contains(e["error"], c.errHas) {
			t.Errorf("%s: %d %q, want %d naming %s", c.name, code, e["error"], c.code, c.errHas)
		}
	}

	ack := base + "/api/device/larkspur-bed-01/acknowledge"
	if code, body := webPost(t, ack, "text/plain", "", "{}"); code != 400 || !strings.Contains(body, "Content-Type") {
		t.Errorf("ack as text/plain: %d %s, want 400 naming Content-Type", code, body)
	}
	if code, _ := webPost(t, ack, "application/json", "http://elsewhere.example", "{}"); code != 403 {
		t.Errorf("ack from another origin: %d, want 403", code)
	}
	if code, body := webPost(t, ack, "application/json", "", `{"bogus":1}`); code != 400 || !strings.Contains(body, "bogus") {
		t.Errorf("ack with an unknown field: %d %s, want 400 naming it", code, body)
	}
	code, body := webPost(t, ack, "application/json", "http://"+h.httpAddr, `{"note":"seen at the bedside"}`)
	if code != 200 || !strings.Contains(body, `"acknowledged_by":"web@127.0.0.1"`) {
		t.Fatalf("ack: %d %s", code, body)
	}
	if code, body := webPost(t, ack, "application/json", "", `{}`); code != 409 {
		t.Errorf("second ack: %d %s, want 409 (nothing left to acknowledge)", code, body)
	}
	audit, err := h.db.Audit(0, "alarm.acknowledged", 0)
	if err != nil {
		t.Fatal(err)
	}
	if len(audit) == 0 || audit[0].Device != "larkspur-bed-01" || audit[0].Actor != "web@127.0.0.1" {
		t.Errorf("audit log: %+v, want an acknowledgement of larkspur-bed-01 by web@127.0.0.1", audit)
	}
}

// Server-Sent Events carry live points; an open event stream does not hold
// up the gateway's shutdown (goleak checks nothing is left).
func TestWebEventsStreamPointsAndEndWithTheGateway(t *testing.T) {
	h := newHarness(t, nil)
	d, _ := h.connect(t, summaryIntro("sse-01"))
	resp, err := http.Get("http://" + h.httpAddr + "/api/events?device=sse-01")
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	if ct := resp.Header.Get("Content-Type"); ct != "text/event-stream" {
		t.Fatalf("content type %q", ct)
	}
	base := time.Now().Add(-time.Minute).UnixMilli()
	d.send(summary(1, base, 94.5))
	d.waitAck(1)
	sc := bufio.NewScanner(resp.Body)
	var event string
	for sc.Scan() {
		line := sc.Text()
		if v, ok := strings.CutPrefix(line, "event: "); ok {
			event = v
		}
		if v, ok := strings.CutPrefix(line, "data: "); ok && event == "point" {
			var p struct {
				Device string   `json:"device_id"`
				SpO2   *float64 `json:"spo2_pct"`
			}
			if err := json.Unmarshal([]byte(v), &p); err != nil {
				t.Fatal(err)
			}
			if p.Device != "sse-01" || p.SpO2 == nil || *p.SpO2 != 94.5 {
				t.Fatalf("point %s", v)
			}
			break
		}
	}
	if err := sc.Err(); err != nil {
		t.Fatal(err)
	}
	d.close()
	h.stop() // must return with the event stream still open
}

// requireTool fails when PULSEFLEET_REQUIRE_TOOLS is set and the tool is
// missing; otherwise it skips.
func requireTool(t *testing.T, path string) {
	t.Helper()
	if _, err := os.Stat(path); err != nil {
		if os.Getenv("PULSEFLEET_REQUIRE_TOOLS") != "" {
			t.Fatalf("%s is required (PULSEFLEET_REQUIRE_TOOLS is set): %v; run .ci/deps.d/chromium.sh", path, err)
		}
		t.Skipf("%s not installed: %v", path, err)
	}
}

// The page in a real headless Chromium: it lists the fleet, shows the alarm
// by word and shape, takes live values, and an operator's click
// acknowledges the alarm: the page shows it and the audit log holds it.
func TestWebPageInChromium(t *testing.T) {
	const chromium = "/usr/bin/chromium"
	requireTool(t, chromium)
	h, clk := newWebHarness(t)
	open := webFleet(t, h, clk)
	shots := os.Getenv("PULSEFLEET_SCREENSHOT_DIR")
	if shots == "" {
		shots = t.TempDir()
	}

	ctx, cancel := context.WithTimeout(context.Background(), 4*time.Minute)
	defer cancel()
	opts := []chromedp.ExecAllocatorOption{
		chromedp.ExecPath(chromium),
		chromedp.Flag("headless", true),
		chromedp.NoSandbox,
		chromedp.Flag("disable-gpu", true),
		chromedp.Flag("disable-quic", true),
		chromedp.NoFirstRun,
		chromedp.NoDefaultBrowserCheck,
		chromedp.Flag("disable-background-networking", true),
		chromedp.Flag("disable-component-update", true),
		chromedp.Flag("disable-sync", true),
		chromedp.Flag("disable-dev-shm-usage", true),
		chromedp.UserDataDir(t.TempDir()),
		chromedp.WindowSize(1440, 900),
	}
	actx, acancel := chromedp.NewExecAllocator(ctx, opts...)
	defer acancel()
	bctx, bcancel := chromedp.NewContext(actx)
	defer func() {
		bcancel()
		acancel()
	}()

	base := "http://" + h.httpAddr
	// The first run starts the browser, which lives as long as bctx; later
	// steps each get a bounded context derived from it.
	if err := chromedp.Do(bctx); err != nil {
		t.Fatalf("start %s: %v", chromium, err)
	}
	start := time.Now()
	do := func(what string, steps ...chromedp.Action[chromedp.Void]) {
		t.Helper()
		defer func() { t.Logf("%s done after %v", what, time.Since(start).Round(time.Millisecond)) }()
		sctx, cancel := context.WithTimeout(bctx, 60*time.Second) // a bound, not a wait: under load a step can take tens of seconds
		defer cancel()
		if err := chromedp.Do(sctx, steps...); err != nil {
			t.Fatalf("%s: %v", what, err)
		}
	}
	// text reads an element's text in one evaluation in the page. (The
	// page rebuilds a row whenever what it shows changes, a stale row every
	// second; chromedp.Text finds the node in one round trip and reads it in
	// another, and under load the node read was often a detached one, whose
	// text chromedp gives as "".)
	text := func(sel string) string {
		t.Helper()
		q, _ := json.Marshal(sel)
		v, err := chromedp.Run(bctx, chromedp.Evaluate[string](fmt.Sprintf(`(e => e ? e.innerText : '(no element)')(document.querySelector(%s))`, q)))
		if err != nil {
			t.Fatalf("text of %s: %v", sel, err)
		}
		return v
	}
	eval := func(expr string) string {
		t.Helper()
		v, err := chromedp.Run(bctx, chromedp.Evaluate[string](expr))
		if err != nil {
			t.Fatalf("%s: %v", expr, err)
		}
		return v
	}
	shoot := func(name string) {
		t.Helper()
		do("settle", chromedp.Sleep(300*time.Millisecond)) // let the last paint finish; nothing is timed
		png, err := chromedp.Run(bctx, chromedp.FullScreenshot(100))
		if err != nil {
			t.Fatalf("screenshot %s: %v", name, err)
		}
		if err := os.MkdirAll(shots, 0o755); err != nil {
			t.Fatal(err)
		}
		if err := os.WriteFile(filepath.Join(shots, name), png, 0o644); err != nil {
			t.Fatal(err)
		}
	}
	row := func(id string) string { return fmt.Sprintf(`#fleet tr[data-device="%s"]`, id) }

	do("fleet page", chromedp.Navigate(base+"/"), chromedp.WaitVisible(row("proto-raw-01")), chromedp.WaitVisible(`#live.on`))
	if c := text("#caution"); !strings.Contains(c, caution.Text) {
		t.Errorf("caution banner %q", c)
	}
	if n := eval(`document.querySelectorAll('#fleet tbody tr.row').length + ''`); n != "6" {
		t.Errorf("%s device rows, want 6", n)
	}
	if b := text(row("larkspur-bed-01") + " .badge"); !strings.HasPrefix(b, "HIGH") {
		t.Errorf("larkspur-bed-01 alarm badge %q, want the word HIGH", b)
	}
	// Each priority has its own shape beside its word: high a triangle (3
	// points), medium a diamond (4 points), low a square (rect).
	shapes := eval(`[...document.querySelectorAll('#fleet tbody .badge[data-priority]')].map(b => b.querySelector('b').textContent + ':' +
		[b.querySelector('svg > *')].map(e => e.tagName + (e.getAttribute('points') ? e.getAttribute('points').split(' ').length : '')).join()).join(' ')`)
	for _, want := range []string{"HIGH:polygon3", "MEDIUM:polygon4", "LOW:rect"} {
		if !strings.Contains(shapes, want) {
			t.Errorf("badges %q lack %s", shapes, want)
		}
	}

	// Live: a new second from larkspur-bed-02 reaches the row through the event stream.
	d2 := open["larkspur-bed-02"]
	d2.send(summary(1801, time.Now().Add(-time.Second).UnixMilli(), 93))
	d2.waitAck(1801)
	do("live value", chromedp.Poll[chromedp.Void](fmt.Sprintf(`document.querySelector('%s td.v-spo2').textContent === '93'`, row("larkspur-bed-02")),
		chromedp.WithPollingTimeout(20*time.Second)))
	shoot("fleet-page.png")

	// larkspur-bed-01's values stopped: once stale, its value cells change
	// every second (their age). The row is patched cell by cell, so its
	// Acknowledge button stays the same node and a click that straddles an
	// update is not lost.
	eval(fmt.Sprintf(`window.pfAck = document.querySelector('%[1]s button.ack'); window.pfSpO2 = document.querySelector('%[1]s td.v-spo2'); ''`, row("larkspur-bed-01")))
	do("stale value cell updated", chromedp.Poll[chromedp.Void](`!window.pfSpO2.isConnected`, chromedp.WithPollingTimeout(30*time.Second)))
	if c := eval(`String(window.pfAck !== null && window.pfAck.isConnected)`); c != "true" {
		t.Errorf("the Acknowledge button was replaced when only the row's values changed (connected: %s)", c)
	}

	// The operator acknowledges larkspur-bed-01's alarm.
	do("acknowledge", chromedp.Click(row("larkspur-bed-01")+` button.ack`), chromedp.WaitVisible(row("larkspur-bed-01")+` .acknote`))
	if note := text(row("larkspur-bed-01") + ` .acknote`); !strings.Contains(note, "acknowledged by web@127.0.0.1") {
		t.Errorf("after the click the row says %q", note)
	}
	audit, err := h.db.Audit(0, "alarm.acknowledged", 0)
	if err != nil {
		t.Fatal(err)
	}
	found := false
	for _, a := range audit {
		found = found || (a.Device == "larkspur-bed-01" && a.Actor == "web@127.0.0.1")
	}
	if !found {
		t.Errorf("audit log has no acknowledgement of larkspur-bed-01 by web@127.0.0.1: %+v", audit)
	}
	eps, err := h.db.Episodes(store.EpisodeFilter{Device: "larkspur-bed-01", ActiveOnly: true})
	if err != nil || len(eps) == 0 || eps[0].AckedBy != "web@127.0.0.1" {
		t.Errorf("stored episode %+v (%v), want acknowledged by web@127.0.0.1", eps, err)
	}
	shoot("fleet-page-acknowledged.png")

	// Device pages: the alarmed patient (trend, quality, episodes), and the raw prototype's waveform.
	do("device page", chromedp.Navigate(base+"/device/larkspur-bed-01"), chromedp.WaitVisible(`#trend svg.chart path.line`), chromedp.WaitVisible(`#episodes`))
	if q, e := text(`#quality`), text(`#episodes`); !strings.Contains(q, "100.0 %") || !strings.Contains(e, "SpO2 low") || !strings.Contains(e, "web@127.0.0.1") {
		t.Errorf("device page: quality %q; episodes %q", q, e)
	}
	// The page lists its own gateway's episodes only and says so (merged
	// history across gateways is the episodes command's).
	if sc := text(`#episodes-scope`); !strings.Contains(sc, "this gateway only") || !strings.Contains(sc, "pulsefleet episodes --gateway") {
		t.Errorf("device page: episode scope note %q", sc)
	}
	shoot("device-page.png")
	do("raw device page", chromedp.Navigate(base+"/device/proto-raw-01"), chromedp.WaitVisible(`#raw h2`))
	do("raw waveform", chromedp.WaitVisible(`#raw svg.chart path.line2`))
	shoot("device-raw-page.png")
	t.Logf("screenshots in %s", shots)
}

// With tokens issued, the page needs a login: a viewer reads but cannot
// acknowledge, an operator acknowledges only with the session's CSRF token,
// and the audit log names the operator.
func TestWebLoginRolesAndCSRF(t *testing.T) {
	h := newHarness(t, func(o *Options) { o.DefaultProfile = webProfile(t) })
	d, _ := h.connect(t, summaryIntro("ward-x-01"))
	base := time.Now().Add(-time.Minute).UnixMilli()
	for s := uint64(1); s <= 10; s++ {
		d.send(summary(s, base+int64(s)*1000, 86)) // below 90 % for 10 s: announced after 2 s
	}
	d.waitAck(10)
	_, viewer, operator := webRoles(t, h)
	url := "http://" + h.httpAddr

	noRedirect := func(*http.Request, []*http.Request) error { return http.ErrUseLastResponse }
	anon := &http.Client{CheckRedirect: noRedirect}
	req, _ := http.NewRequest(http.MethodGet, url+"/", nil)
	req.Header.Set("Accept", "text/html")
	resp, err := anon.Do(req)
	if err != nil {
		t.Fatal(err)
	}
	resp.Body.Close()
	if resp.StatusCode != http.StatusSeeOther || resp.Header.Get("Location") != "/login" {
		t.Errorf("page without login: %d to %q, want 303 to /login", resp.StatusCode, resp.Header.Get("Location"))
	}
	if c := webGet(t, url+"/api/fleet", nil); c != http.StatusUnauthorized {
		t.Errorf("JSON without login: %d, want 401", c)
	}

	post := func(c *http.Client, csrf string) int {
		t.Helper()
		code, _ := sessionPost(t, c, url+"/api/device/ward-x-01/acknowledge", csrf, "application/json", `{}`)
		return code
	}

	vc, vcsrf := webLogin(t, url, viewer)
	if resp, err := vc.Get(url + "/api/fleet"); err != nil || resp.StatusCode != 200 {
		t.Errorf("viewer reads the fleet: %v %v", resp, err)
	} else {
		resp.Body.Close()
	}
	if c := post(vc, vcsrf); c != http.StatusForbidden {
		t.Errorf("viewer acknowledges: %d, want 403", c)
	}
	oc, ocsrf := webLogin(t, url, operator)
	if c := post(oc, ""); c != http.StatusForbidden {
		t.Errorf("operator without the CSRF token: %d, want 403", c)
	}
	if c := post(oc, ocsrf); c != http.StatusOK {
		t.Fatalf("operator with the CSRF token: %d, want 200", c)
	}
	audit, err := h.db.Audit(0, "alarm.acknowledged", 0)
	if err != nil || len(audit) != 1 || audit[0].Actor != "nurse-web" || audit[0].Device != "ward-x-01" {
		t.Errorf("audit %+v (%v), want one acknowledgement of ward-x-01 by nurse-web", audit, err)
	}
}
