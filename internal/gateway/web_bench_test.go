package gateway

import (
	"io"
	"net/http"
	"os"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/chromedp/chromedp"
)

// BenchmarkWebOverview5000 measures the overview of 5,000 devices (plus the
// handful the overview test alarms): the server's /api/fleet answer (with
// and without sparklines), the first full render in headless Chromium (page
// load, fetch and the first screen of rows), and applying one refresh of
// all 5,008 devices to the open page (merge, re-order, re-render the rows
// in view) after 100 of them changed. Run with
//
//	go test -run '^$' -bench WebOverview5000 -benchtime 10x ./internal/gateway/
//
// and report the figures with the machine's load average (uptime).
func BenchmarkWebOverview5000(b *testing.B) {
	h := newHarness(b, func(o *Options) { o.DefaultProfile = webProfile(b) })
	bigFleet(b, h, 5000)
	alarmingDevices(b, h)
	base := "http://" + h.httpAddr
	if la, err := os.ReadFile("/proc/loadavg"); err == nil {
		b.Logf("load average at start: %s", strings.TrimSpace(string(la)))
	}

	for _, q := range []string{"", "?spark=0&quality=0"} {
		b.Run("api_fleet"+strings.NewReplacer("?", "_", "&", "_").Replace(q), func(b *testing.B) {
			var size int
			for i := 0; i < b.N; i++ {
				resp, err := http.Get(base + "/api/fleet" + q)
				if err != nil {
					b.Fatal(err)
				}
				body, err := io.ReadAll(resp.Body)
				resp.Body.Close()
				if err != nil || resp.StatusCode != 200 {
					b.Fatalf("%d %v", resp.StatusCode, err)
				}
				size = len(body)
			}
			b.ReportMetric(float64(size), "bytes/answer")
		})
	}

	br := newBrowser(b, 1280, 800)
	b.Run("chromium_first_render", func(b *testing.B) {
		var page float64
		for i := 0; i < b.N; i++ {
			br.do("overview", chromedp.Navigate(base+"/?stale=3600"))
			br.do("rows", chromedp.Poll[chromedp.Void](`document.getElementById('count-all') && document.getElementById('count-all').textContent === '5008' && document.querySelector('#fleet tbody tr.row')`,
				chromedp.WithPollingTimeout(60*time.Second), chromedp.WithPollingInterval(5*time.Millisecond)))
			ms, err := strconv.ParseFloat(br.eval(`String(pulsefleet.firstApplyMS)`), 64)
			if err != nil {
				b.Fatal(err)
			}
			page += ms
		}
		// The page's own share: merging, ordering and rendering the first answer.
		b.ReportMetric(page/float64(b.N), "page-ms/first-apply")
	})
	b.Run("chromium_apply_refresh_100_changed", func(b *testing.B) {
		br.eval(`fetch('/api/fleet?spark=0&quality=0').then(r => r.json()).then(d => { window.__d = d; }), ''`)
		br.waitFor("data", `!!window.__d`)
		var total float64
		for i := 0; i < b.N; i++ {
			v := br.eval(`(() => { const d = window.__d; const n = d.devices.length; const k = ` + strconv.Itoa(i) + `;
				for (let j = 0; j < 100; j++) { const x = d.devices[(k * 100 + j * 37) % n].device; x.latest = x.latest || {}; x.latest.spo2_pct = 90 + ((k + j) % 10); }
				const t0 = performance.now(); pulsefleet.apply(d); return String(performance.now() - t0) })()`)
			ms, err := strconv.ParseFloat(v, 64)
			if err != nil {
				b.Fatal(err)
			}
			total += ms
		}
		b.ReportMetric(total/float64(b.N), "page-ms/refresh")
	})
	if la, err := os.ReadFile("/proc/loadavg"); err == nil {
		b.Logf("load average at end: %s", strings.TrimSpace(string(la)))
	}
}
