package prometheus

import (
	"bytes"
	"context"
	"io"
	"math"
	"net"
	"net/http"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"sort"
	"strings"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"go.uber.org/goleak"
	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials/insecure"

	"github.com/pulsefleet/pulsefleet/internal/gateway"
	"github.com/pulsefleet/pulsefleet/internal/notify"
	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

func TestMain(m *testing.M) { goleak.VerifyTestMain(m) }

// promtool returns the path of promtool; without it the test fails when
// PULSEFLEET_REQUIRE_TOOLS is set (CI) and is skipped otherwise.
func promtool(t *testing.T) string {
	t.Helper()
	p, err := exec.LookPath("promtool")
	if err != nil {
		if os.Getenv("PULSEFLEET_REQUIRE_TOOLS") != "" {
			t.Fatalf("promtool is required (PULSEFLEET_REQUIRE_TOOLS is set): %v; .ci/deps.d/promtool.sh installs it", err)
		}
		t.Skipf("promtool not installed: %v", err)
	}
	return p
}

func run(t *testing.T, name string, args ...string) string {
	t.Helper()
	out, err := exec.Command(name, args...).CombinedOutput()
	if err != nil {
		t.Fatalf("%s %s: %v\n%s", filepath.Base(name), strings.Join(args, " "), err, out)
	}
	return string(out)
}

func ruleFiles(t *testing.T) []string {
	t.Helper()
	files, err := filepath.Glob(filepath.Join("rules", "*.yml"))
	if err != nil || len(files) < 2 {
		t.Fatalf("rule files: %v %v", files, err)
	}
	return files
}

func TestRulesAndConfigAreValid(t *testing.T) {
	pt := promtool(t)
	out := run(t, pt, append([]string{"check", "rules"}, ruleFiles(t)...)...)
	if strings.Count(out, "SUCCESS") != len(ruleFiles(t)) {
		t.Errorf("promtool check rules:\n%s", out)
	}
	run(t, pt, "check", "config", "prometheus.yml")
}

// The rules' unit tests (tests/*.test.yml): every alert fires when and only
// when its condition has held for its duration, with the labels and text
// an operator sees; the recording rules give the uptime and ratios by hand.
func TestRulesUnitTests(t *testing.T) {
	pt := promtool(t)
	tests, err := filepath.Glob(filepath.Join("tests", "*.test.yml"))
	if err != nil || len(tests) == 0 {
		t.Fatalf("no rule tests: %v", err)
	}
	out := run(t, pt, append([]string{"test", "rules"}, tests...)...)
	if strings.Contains(out, "FAILED") || !strings.Contains(out, "SUCCESS") {
		t.Errorf("promtool test rules:\n%s", out)
	}
}

// A real gateway with devices streaming into it serves a /metrics that
// `promtool check metrics` finds clean, and it exposes every pulsefleet_
// series the rules use (a renamed metric would silently break an alert).
func TestLiveMetricsAreCleanAndCoverTheRules(t *testing.T) {
	pt := promtool(t)
	db, err := store.Open(t.TempDir(), store.Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	reg := &describedRegistry{Registry: prometheus.NewRegistry(), names: map[string]bool{}}
	if err := gateway.RegisterRuntime(reg); err != nil {
		t.Fatal(err)
	}
	// serve registers the notifier's metrics on every gateway, with or
	// without --alertmanager (cmd/pulsefleet/serve_notify.go).
	if _, err := notify.NewMetrics(reg); err != nil {
		t.Fatal(err)
	}
	gw, err := gateway.New(gateway.Options{Store: db, Registerer: reg, BatchDelay: 5 * time.Millisecond})
	if err != nil {
		t.Fatal(err)
	}
	gl, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	hl, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- gw.Serve(ctx, gl, hl) }()
	defer func() {
		cancel()
		if err := <-done; err != nil {
			t.Errorf("serve: %v", err)
		}
	}()

	// Two devices: one streams summaries (one skipped sequence number) and
	// reports its battery, the other connects and leaves.
	conn, err := grpc.NewClient(gl.Addr().String(), grpc.WithTransportCredentials(insecure.NewCredentials()))
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close()
	stream := func(id string, n uint64) (pb.IngestService_ConnectClient, context.CancelFunc) {
		sctx, scancel := context.WithCancel(ctx)
		st, err := pb.NewIngestServiceClient(conn).Connect(sctx)
		if err != nil {
			t.Fatal(err)
		}
		send := func(m *pb.ConnectRequest) {
			if err := st.Send(m); err != nil {
				t.Fatal(err)
			}
		}
		send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Introduction{Introduction: &pb.Introduction{DeviceId: id, Mode: pb.Mode_MODE_SUMMARY}}})
		send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Status{Status: &pb.DeviceStatus{BatteryPct: 64, TemperatureC: 30}}})
		base := time.Now().Add(-time.Minute).UnixMilli()
		var last uint64
		for s := uint64(1); s <= n; s++ {
			if s == 3 {
				continue
			}
			v, q := 95.0, 0.9
			send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Summary{Summary: &pb.Summary{Sequence: s, DeviceTimeUnixMs: base + int64(s)*1000, Spo2Pct: &v, Quality: &q}}})
			last = s
		}
		for { // until everything is acknowledged
			m, err := st.Recv()
			if err != nil {
				t.Fatalf("%s: %v", id, err)
			}
			if a := m.GetAck(); a != nil && a.GetThroughSequence() >= last {
				break
			}
		}
		return st, scancel
	}
	// A raw device too, so the estimator's labelled series are in the scrape.
	rctx, rcancel := context.WithCancel(ctx)
	defer rcancel()
	rs, err := pb.NewIngestServiceClient(conn).Connect(rctx)
	if err != nil {
		t.Fatal(err)
	}
	rsend := func(m *pb.ConnectRequest) {
		if err := rs.Send(m); err != nil {
			t.Fatal(err)
		}
	}
	rsend(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Introduction{Introduction: &pb.Introduction{DeviceId: "metrics-raw-01", Mode: pb.Mode_MODE_RAW, AdcBits: 16}}})
	rbase := time.Now().Add(-time.Minute).UnixMilli()
	const chunks = 16 // 4 s at 100 Hz
	for i := 0; i < chunks; i++ {
		c := &pb.RawChunk{Sequence: uint64(i + 1), DeviceTimeUnixMs: rbase + int64(i)*250, SampleRateHz: 100}
		for j := 0; j < 25; j++ {
			v := uint32(30000 + 1500*math.Sin(2*math.Pi*1.2*float64(i*25+j)/100))
			c.Red, c.Ir = append(c.Red, v), append(c.Ir, v+3000)
		}
		rsend(&pb.ConnectRequest{Kind: &pb.ConnectRequest_RawChunk{RawChunk: c}})
	}
	for {
		m, err := rs.Recv()
		if err != nil {
			t.Fatalf("raw device: %v", err)
		}
		if m.GetAck().GetThroughSequence() >= chunks {
			break
		}
	}
	_, stop1 := stream("metrics-dev-01", 20)
	defer stop1()
	st2, stop2 := stream("metrics-dev-02", 5)
	_ = st2.CloseSend()
	stop2()

	url := "http://" + hl.Addr().String() + "/metrics"
	var body []byte
	deadline := time.Now().Add(10 * time.Second)
	for {
		resp, err := http.Get(url)
		if err != nil {
			t.Fatal(err)
		}
		body, err = io.ReadAll(resp.Body)
		resp.Body.Close()
		if err != nil {
			t.Fatal(err)
		}
		if bytes.Contains(body, []byte(`pulsefleet_device_connected{device="metrics-dev-02"} 0`)) || time.Now().After(deadline) {
			break
		}
		time.Sleep(20 * time.Millisecond)
	}

	cmd := exec.Command(pt, "check", "metrics")
	cmd.Stdin = bytes.NewReader(body)
	out, err := cmd.CombinedOutput()
	if err != nil || len(bytes.TrimSpace(out)) > 0 {
		t.Errorf("promtool check metrics on a live /metrics: %v\n%s", err, out)
	}
	for _, want := range []string{
		`pulsefleet_device_connected{device="metrics-dev-01"} 1`,
		`pulsefleet_device_connected{device="metrics-dev-02"} 0`,
		`pulsefleet_device_battery_ratio{device="metrics-dev-01"} 0.64`,
		`pulsefleet_device_valid_spo2_ratio{device="metrics-dev-01"} 1`,
		`pulsefleet_messages_lost_total 2`,
		`pulsefleet_samples_received_total 400`,
		`pulsefleet_estimator_seconds_total{outcome=`,
	} {
		if !bytes.Contains(body, []byte(want)) {
			t.Errorf("/metrics lacks %q", want)
		}
	}

	// Every pulsefleet_ metric the rules read is one the gateway registers
	// (a labelled family without series yet is not in the scrape, so the
	// names come from the collectors' descriptions; a histogram by its
	// _bucket series). Names of recording rules (level:name:op) are skipped.
	exposed := reg.names
	used := map[string]bool{}
	for _, f := range ruleFiles(t) {
		b, err := os.ReadFile(f)
		if err != nil {
			t.Fatal(err)
		}
		for _, m := range regexp.MustCompile(`(?m)^\s*expr:[\s|]*((?:.|\n\s{10,})*)`).FindAllStringSubmatch(string(b), -1) {
			for _, n := range regexp.MustCompile(`(?:^|[^:\w])(pulsefleet_\w+)`).FindAllStringSubmatch(m[1], -1) {
				used[n[1]] = true
			}
		}
	}
	if len(used) < 8 {
		t.Fatalf("found only %d metric names in the rules: %v", len(used), used)
	}
	var missing []string
	for name := range used {
		if !exposed[name] {
			missing = append(missing, name)
		}
	}
	sort.Strings(missing)
	if len(missing) > 0 {
		t.Errorf("rules use metrics the gateway does not expose: %v", missing)
	}
}

// describedRegistry is a registry that remembers the metric names of every
// collector registered with it.
type describedRegistry struct {
	*prometheus.Registry
	names map[string]bool
}

var fqName = regexp.MustCompile(`fqName: "([^"]+)"`)

func (r *describedRegistry) Register(c prometheus.Collector) error {
	ch := make(chan *prometheus.Desc)
	go func() { c.Describe(ch); close(ch) }()
	for d := range ch {
		if m := fqName.FindStringSubmatch(d.String()); m != nil {
			r.names[m[1]] = true
			r.names[m[1]+"_bucket"] = true // harmless for non-histograms
		}
	}
	return r.Registry.Register(c)
}
