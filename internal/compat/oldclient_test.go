package compat

import (
	"bufio"
	"bytes"
	"context"
	"encoding/binary"
	"encoding/json"
	"fmt"
	"io"
	"net"
	"os"
	"os/exec"
	"path/filepath"
	"reflect"
	"sync"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials/insecure"
	"google.golang.org/protobuf/proto"
	"google.golang.org/protobuf/reflect/protoreflect"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/internal/gateway"
	"github.com/pulsefleet/pulsefleet/internal/shard"
	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// The reports below mirror the JSON the frozen client prints
// (testdata/oldclient/main.go); a current client's view is put in the same
// shape so the two can be compared field by field.

type deviceReport struct {
	Welcome *struct {
		ResumeAfter  uint64 `json:"resume_after"`
		HasTime      bool   `json:"has_time"`
		HasSession   bool   `json:"has_session"`
		Calibration  string `json:"calibration"`
		NoticeLength int    `json:"notice_length"`
	} `json:"welcome,omitempty"`
	Redirect *struct {
		Address string `json:"address"`
		Detail  string `json:"detail"`
	} `json:"redirect,omitempty"`
	StreamError  string         `json:"stream_error,omitempty"`
	Configs      int            `json:"configs"`
	DataSent     int            `json:"data_sent"`
	Acked        uint64         `json:"acked"`
	RateLimited  int            `json:"rate_limited"`
	BulkRejected int            `json:"bulk_rejected"`
	Rejections   []rejectReport `json:"rejections"`
}

type rejectReport struct {
	Sequence uint64 `json:"sequence"`
	Reason   string `json:"reason"`
	Field    string `json:"field"`
}

type fleetReport struct {
	Devices  []deviceView  `json:"devices"`
	Points   []pointView   `json:"points"`
	Buckets  []bucketView  `json:"buckets"`
	Episodes []episodeView `json:"episodes"`
}

type deviceView struct {
	ID           string            `json:"id"`
	Model        string            `json:"model"`
	Firmware     string            `json:"firmware"`
	Mode         string            `json:"mode"`
	Labels       map[string]string `json:"labels"`
	Connected    bool              `json:"connected"`
	LastSequence uint64            `json:"last_sequence"`
	Battery      float64           `json:"battery"`
	Calibration  string            `json:"calibration"`
	Profile      string            `json:"profile"`
	Priority     string            `json:"priority"`
	LatestTimeMS int64             `json:"latest_time_ms"`
}

type pointView struct {
	TimeMS int64    `json:"t"`
	SpO2   *float64 `json:"spo2"`
	Pulse  *float64 `json:"pulse"`
	PI     *float64 `json:"pi"`
	SQI    *float64 `json:"sqi"`
	Ratio  *float64 `json:"ratio"`
	Flags  uint32   `json:"flags"`
	Source string   `json:"source"`
}

type bucketView struct {
	StartMS int64    `json:"start"`
	Points  uint32   `json:"points"`
	SpO2    statView `json:"spo2"`
	Pulse   statView `json:"pulse"`
}

type statView struct {
	Count  uint32     `json:"n"`
	Values [3]float64 `json:"v"`
}

type episodeView struct {
	ID        uint64   `json:"id"`
	Device    string   `json:"device"`
	Condition string   `json:"condition"`
	Priority  string   `json:"priority"`
	OnsetMS   int64    `json:"onset"`
	Announced int64    `json:"announced"`
	Ended     int64    `json:"ended"`
	MinSpO2   *float64 `json:"min_spo2"`
	Deficit   float64  `json:"deficit"`
	Active    bool     `json:"active"`
	Profile   string   `json:"profile"`
}

var (
	oldOnce sync.Once
	oldPath string
	oldErr  error
)

// oldClient builds the frozen client once per test process.
func oldClient(t *testing.T) string {
	t.Helper()
	if testing.Short() {
		t.Skip("builds and runs the frozen client as a process; skipped with -short")
	}
	oldOnce.Do(func() {
		dir, err := os.MkdirTemp("", "pulsefleet-oldclient-")
		if err != nil {
			oldErr = err
			return
		}
		cleanups = append(cleanups, func() { os.RemoveAll(dir) })
		oldPath = filepath.Join(dir, "oldclient")
		if out, err := exec.Command("go", "build", "-o", oldPath, "./testdata/oldclient").CombinedOutput(); err != nil {
			oldErr = fmt.Errorf("go build ./testdata/oldclient: %v\n%s", err, out)
		}
	})
	if oldErr != nil {
		t.Fatal(oldErr)
	}
	return oldPath
}

// runOld runs the frozen client and decodes its report into rep.
func runOld(t *testing.T, rep any, args ...string) {
	t.Helper()
	cmd := exec.Command(oldClient(t), args...)
	var stderr bytes.Buffer
	cmd.Stderr = &stderr
	out, err := cmd.Output()
	if err != nil {
		t.Fatalf("oldclient %v: %v\n%s", args, err, stderr.Bytes())
	}
	dec := json.NewDecoder(bytes.NewReader(out))
	dec.DisallowUnknownFields()
	if err := dec.Decode(rep); err != nil {
		t.Fatalf("oldclient %v: report: %v\n%s", args, err, out)
	}
}

// testProfile is the alarm profile of these tests (test configuration, not a
// recommendation): SpO2 below 90 % for 3 s is a medium-priority alarm.
const testProfile = `name: compat-test
conditions:
  - kind: spo2_low
    limit: 90
    hysteresis: 2
    delay: 3s
    priority: medium
`

// startGateway runs a current gateway on loopback sockets over a real bbolt
// file; it returns its gRPC address and a current client connection.
func startGateway(t *testing.T, mutate func(o *gateway.Options, grpcAddr string)) (string, *grpc.ClientConn) {
	t.Helper()
	db, err := store.Open(t.TempDir(), store.Options{})
	if err != nil {
		t.Fatal(err)
	}
	prof, err := alarms.ParseProfile([]byte(testProfile))
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
	addr := gl.Addr().String()
	opt := gateway.Options{Store: db, DefaultProfile: prof, BatchDelay: 5 * time.Millisecond, WatchdogEvery: 50 * time.Millisecond}
	if mutate != nil {
		mutate(&opt, addr)
	}
	g, err := gateway.New(opt)
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- g.Serve(ctx, gl, hl) }()
	conn, err := grpc.NewClient(addr, grpc.WithTransportCredentials(insecure.NewCredentials()))
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() {
		conn.Close()
		cancel()
		if err := <-done; err != nil {
			t.Errorf("serve: %v", err)
		}
		if err := db.Check(); err != nil {
			t.Errorf("store integrity: %v", err)
		}
		db.Close()
	})
	for deadline := time.Now().Add(20 * time.Second); !g.Ready(); time.Sleep(10 * time.Millisecond) {
		if time.Now().After(deadline) {
			t.Fatal("gateway not ready within 20 s")
		}
	}
	return addr, conn
}

type recorded struct {
	tag byte
	msg *pb.ConnectRequest // decoded with the current generated code
}

// readRecording decodes what the frozen client sent, with today's types.
func readRecording(t *testing.T, path string) []recorded {
	t.Helper()
	f, err := os.Open(path)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	r := bufio.NewReader(f)
	var out []recorded
	for {
		tag, err := r.ReadByte()
		if err == io.EOF {
			return out
		}
		if err != nil {
			t.Fatal(err)
		}
		n, err := binary.ReadUvarint(r)
		if err != nil {
			t.Fatal(err)
		}
		b := make([]byte, n)
		if _, err := io.ReadFull(r, b); err != nil {
			t.Fatal(err)
		}
		m := &pb.ConnectRequest{}
		if err := proto.Unmarshal(b, m); err != nil {
			t.Fatalf("a message of the frozen client does not decode with the current types: %v", err)
		}
		if len(m.ProtoReflect().GetUnknown()) != 0 {
			t.Fatalf("a message of the frozen client has fields the current types do not know: %v", m)
		}
		out = append(out, recorded{tag, m})
	}
}

// replay sends what the frozen client sent, as a current client would (the
// current generated code, the device id replaced), following the same
// script: introduction, status, all data (resending after a rate limit), the
// messages that must be rejected one by one, a final message.
func replay(t *testing.T, conn *grpc.ClientConn, recs []recorded, id string) *deviceReport {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), 2*time.Minute)
	defer cancel()
	st, err := pb.NewIngestServiceClient(conn).Connect(ctx)
	if err != nil {
		t.Fatal(err)
	}
	in := make(chan *pb.ConnectResponse, 64)
	go func() {
		defer close(in)
		for {
			m, err := st.Recv()
			if err != nil {
				return
			}
			in <- m
		}
	}()
	rep := &deviceReport{Rejections: []rejectReport{}}
	probing, rateFrom, lastBulk := false, uint64(0), uint64(0)
	book := func(m *pb.ConnectResponse) {
		switch k := m.Kind.(type) {
		case *pb.ConnectResponse_Ack:
			rep.Acked = max(rep.Acked, k.Ack.GetThroughSequence())
		case *pb.ConnectResponse_Config:
			rep.Configs++
		case *pb.ConnectResponse_Rejection:
			r := k.Rejection
			switch {
			case r.GetReason() == pb.RejectReason_REJECT_REASON_RATE_LIMITED:
				rep.RateLimited++
				if rateFrom == 0 || r.GetSequence() < rateFrom {
					rateFrom = r.GetSequence()
				}
			case !probing:
				rep.BulkRejected++
				lastBulk = r.GetSequence()
			default:
				rep.Rejections = append(rep.Rejections, rejectReport{r.GetSequence(), r.GetReason().String(), r.GetField()})
			}
		}
	}
	next := func() *pb.ConnectResponse {
		select {
		case m, ok := <-in:
			if !ok {
				t.Fatalf("current client %s: the stream ended early", id)
			}
			book(m)
			return m
		case <-time.After(time.Minute):
			t.Fatalf("current client %s: no answer within a minute", id)
		}
		return nil
	}
	send := func(m *pb.ConnectRequest) {
		if err := st.Send(m); err != nil {
			t.Fatalf("current client %s: send: %v", id, err)
		}
	}
	var data, rejects []*pb.ConnectRequest
	var final *pb.ConnectRequest
	for _, r := range recs {
		switch r.tag {
		case 'I':
			intro := proto.Clone(r.msg).(*pb.ConnectRequest)
			intro.GetIntroduction().DeviceId = id
			send(intro)
			for rep.Welcome == nil {
				if w := next().GetWelcome(); w != nil {
					rep.Welcome = &struct {
						ResumeAfter  uint64 `json:"resume_after"`
						HasTime      bool   `json:"has_time"`
						HasSession   bool   `json:"has_session"`
						Calibration  string `json:"calibration"`
						NoticeLength int    `json:"notice_length"`
					}{w.GetResumeAfterSequence(), w.GetGatewayTimeUnixMs() > 0, w.GetSessionId() != "", w.GetCalibration(), len(w.GetNotice())}
				}
			}
		case 'S':
			send(r.msg)
		case 'D':
			data = append(data, r.msg)
		case 'R':
			rejects = append(rejects, r.msg)
		case 'F':
			final = r.msg
		default:
			t.Fatalf("recording: unknown tag %q", r.tag)
		}
	}
	n := uint64(len(data))
	rep.DataSent = len(data)
	for from := rep.Welcome.ResumeAfter + 1; rep.Acked < n; {
		for s := from; s <= n; s++ {
			send(data[s-1])
		}
		for rateFrom = 0; rep.Acked < n && rateFrom == 0 && lastBulk != n; {
			next()
		}
		if rep.Acked >= n {
			break
		}
		if rateFrom == 0 {
			t.Fatalf("current client %s: data rejected, acknowledged through %d of %d: %+v", id, rep.Acked, n, *rep)
		}
		time.Sleep(200 * time.Millisecond)
		for drained := false; !drained; {
			select {
			case m, ok := <-in:
				if !ok {
					t.Fatalf("current client %s: the stream ended early", id)
				}
				book(m)
			default:
				drained = true
			}
		}
		from = max(rateFrom, rep.Acked+1)
	}
	probing = true
	for _, m := range rejects {
		if m.GetIntroduction() != nil {
			m = proto.Clone(m).(*pb.ConnectRequest)
			m.GetIntroduction().DeviceId = id
		}
		send(m)
		for want := len(rep.Rejections) + 1; len(rep.Rejections) < want; {
			next()
		}
	}
	send(final)
	for rep.Acked < n+1 {
		next()
	}
	st.CloseSend()
	for range in {
	}
	return rep
}

// currentView reads the same things the frozen fleet client reads, with the
// current client.
func currentView(t *testing.T, conn *grpc.ClientConn, device string, from, to int64) *fleetReport {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
	defer cancel()
	fc := pb.NewFleetServiceClient(conn)
	rep := &fleetReport{Devices: []deviceView{}, Points: []pointView{}, Buckets: []bucketView{}, Episodes: []episodeView{}}
	ld, err := fc.ListDevices(ctx, &pb.ListDevicesRequest{})
	if err != nil {
		t.Fatal(err)
	}
	for _, d := range ld.GetDevices() {
		labels := d.GetLabels()
		if len(labels) == 0 {
			labels = nil
		}
		rep.Devices = append(rep.Devices, deviceView{d.GetDeviceId(), d.GetModel(), d.GetFirmware(), d.GetMode().String(), labels, d.GetConnected(),
			d.GetLastSequence(), d.GetBatteryPct(), d.GetCalibration(), d.GetProfile(), d.GetAlarmPriority().String(), d.GetLatest().GetTimeUnixMs()})
	}
	tr, err := fc.QueryTrend(ctx, &pb.QueryTrendRequest{DeviceId: device, FromUnixMs: from, ToUnixMs: to})
	if err != nil {
		t.Fatal(err)
	}
	for _, p := range tr.GetPoints() {
		rep.Points = append(rep.Points, pointView{p.GetTimeUnixMs(), p.Spo2Pct, p.PulseBpm, p.PiPct, p.Sqi, p.Ratio, p.GetFlags(), p.GetSource().String()})
	}
	tb, err := fc.QueryTrend(ctx, &pb.QueryTrendRequest{DeviceId: device, FromUnixMs: from, ToUnixMs: to, StepMs: 10_000})
	if err != nil {
		t.Fatal(err)
	}
	stat := func(s *pb.Stat) statView {
		return statView{s.GetCount(), [3]float64{s.GetMin(), s.GetMean(), s.GetMax()}}
	}
	for _, b := range tb.GetBuckets() {
		rep.Buckets = append(rep.Buckets, bucketView{b.GetStartUnixMs(), b.GetPoints(), stat(b.GetSpo2Pct()), stat(b.GetPulseBpm())})
	}
	le, err := fc.ListEpisodes(ctx, &pb.ListEpisodesRequest{DeviceId: device})
	if err != nil {
		t.Fatal(err)
	}
	for _, e := range le.GetEpisodes() {
		rep.Episodes = append(rep.Episodes, episodeView{e.GetEpisodeId(), e.GetDeviceId(), e.GetCondition(), e.GetPriority().String(),
			e.GetOnsetUnixMs(), e.GetAnnouncedUnixMs(), e.GetEndedUnixMs(), e.MinSpo2Pct, baselineField10(e), e.GetActive(), e.GetProfile()})
	}
	return rep
}

// baselineField10 reads Episode field 10 (deficit_pct_s in the baseline) by
// number: v1 allows retiring it with its number and name reserved, after
// which old clients read 0, and so does this view.
func baselineField10(e *pb.Episode) float64 {
	fd := e.ProtoReflect().Descriptor().Fields().ByNumber(10)
	if fd == nil || fd.Kind() != protoreflect.DoubleKind {
		return 0
	}
	return e.ProtoReflect().Get(fd).Float()
}

// waitDisconnected waits until the gateway shows none of ids as connected.
func waitDisconnected(t *testing.T, conn *grpc.ClientConn, ids ...string) {
	t.Helper()
	fc := pb.NewFleetServiceClient(conn)
	for deadline := time.Now().Add(30 * time.Second); ; time.Sleep(20 * time.Millisecond) {
		ld, err := fc.ListDevices(context.Background(), &pb.ListDevicesRequest{})
		if err != nil {
			t.Fatal(err)
		}
		open := 0
		for _, d := range ld.GetDevices() {
			for _, id := range ids {
				if d.GetDeviceId() == id && d.GetConnected() {
					open++
				}
			}
		}
		if open == 0 {
			return
		}
		if time.Now().After(deadline) {
			t.Fatalf("%d of %v still connected after 30 s", open, ids)
		}
	}
}

// TestFrozenDevicesAgainstCurrentGateway: round-1 devices (raw and summary)
// stream into today's gateway. Their data is acknowledged and stored exactly
// as the same messages sent by a current client; the rejections are the ones
// the baseline contract names (internal/compat/testdata/v1baseline/pulsefleet/v1/
// ingest.proto: "Delivery contract" and RejectReason); and a round-1
// operator script (FleetService) reads what a current client reads.
func TestFrozenDevicesAgainstCurrentGateway(t *testing.T) {
	oldClient(t)
	addr, conn := startGateway(t, nil)
	// Device time: a backlog ending about now, as after an outage; whole seconds.
	startMS := time.Now().Add(-5 * time.Minute).Truncate(time.Second).UnixMilli()
	from, to := startMS-60_000, startMS+10*60_000

	for _, mode := range []string{"raw", "summary"} {
		t.Run(mode, func(t *testing.T) {
			oldID, curID := "frozen-"+mode, "current-"+mode
			recPath := filepath.Join(t.TempDir(), "sent.bin")
			var old deviceReport
			runOld(t, &old, "device", "-addr", addr, "-id", oldID, "-mode", mode, "-start-ms", fmt.Sprint(startMS), "-record", recPath)

			// What the old device understood, against the baseline contract.
			if old.StreamError != "" || old.Redirect != nil || old.Welcome == nil || old.Acked == 0 {
				t.Fatalf("frozen %s device: welcome %v, redirect %v, stream error %q, acknowledged through %d of %d (%d rejected)",
					mode, old.Welcome, old.Redirect, old.StreamError, old.Acked, old.DataSent, old.BulkRejected)
			}
			n := uint64(old.DataSent)
			wantData := map[string]uint64{"raw": 80, "summary": 90}[mode] // testdata/oldclient/main.go: 40 s in 50-sample chunks at 100 Hz; 90 summaries
			if n != wantData || old.Acked != n+1 || old.Welcome.ResumeAfter != 0 || !old.Welcome.HasTime || !old.Welcome.HasSession || old.Welcome.NoticeLength == 0 {
				t.Errorf("frozen %s device: sent %d (want %d), acknowledged through %d (want %d), welcome %+v", mode, n, wantData, old.Acked, n+1, *old.Welcome)
			}
			if old.RateLimited == 0 && old.BulkRejected != 0 {
				t.Errorf("frozen %s device: %d data messages rejected without any rate limit", mode, old.BulkRejected)
			}
			badField := map[string]string{"raw": "raw_chunk.sample_rate_hz", "summary": "summary.spo2_pct"}[mode]
			want := []struct {
				seq    uint64
				reason string
			}{
				{1, "REJECT_REASON_STALE_SEQUENCE"},    // a resend of a durable message
				{n + 1, "REJECT_REASON_INVALID_FIELD"}, // a field out of its bound
				{n + 1, "REJECT_REASON_WRONG_MODE"},    // the other mode's data kind
				{0, "REJECT_REASON_NOT_INTRODUCED"},    // a second introduction
			}
			if len(old.Rejections) != len(want) {
				t.Fatalf("frozen %s device: rejections %+v, want %v", mode, old.Rejections, want)
			}
			for i, w := range want {
				if r := old.Rejections[i]; r.Sequence != w.seq || r.Reason != w.reason {
					t.Errorf("frozen %s device: rejection %d is %+v, want sequence %d %s", mode, i, r, w.seq, w.reason)
				}
			}
			if f := old.Rejections[1].Field; f != badField {
				t.Errorf("frozen %s device: the invalid field is named %q, want %q", mode, f, badField)
			}
			// ... and exactly what a current client gets for the same messages.
			recs := readRecording(t, recPath)
			cur := replay(t, conn, recs, curID)
			if !reflect.DeepEqual(&old, cur) {
				t.Errorf("frozen and current %s clients were answered differently:\nfrozen  %+v\ncurrent %+v", mode, old, *cur)
			}

			waitDisconnected(t, conn, oldID, curID)
			var oldView fleetReport
			runOld(t, &oldView, "fleet", "-addr", addr, "-device", oldID, "-from", fmt.Sprint(from), "-to", fmt.Sprint(to))
			curView := currentView(t, conn, oldID, from, to)
			if !reflect.DeepEqual(&oldView, curView) {
				t.Errorf("the frozen fleet client reads something other than a current client:\nfrozen  %+v\ncurrent %+v", oldView, *curView)
			}
			// Stored exactly as for the current client's device.
			other := currentView(t, conn, curID, from, to)
			if !reflect.DeepEqual(oldView.Points, other.Points) || !reflect.DeepEqual(oldView.Buckets, other.Buckets) {
				t.Errorf("%s: the frozen device's trend differs from the current client's:\nfrozen  %+v\ncurrent %+v", mode, oldView.Points, other.Points)
			}
			if len(oldView.Episodes) != len(other.Episodes) {
				t.Errorf("%s: %d episodes for the frozen device, %d for the current one", mode, len(oldView.Episodes), len(other.Episodes))
			}
			for i := range min(len(oldView.Episodes), len(other.Episodes)) {
				a, b := oldView.Episodes[i], other.Episodes[i]
				a.ID, a.Device, b.ID, b.Device = 0, "", 0, ""
				if !reflect.DeepEqual(a, b) {
					t.Errorf("%s: episode %d differs: frozen %+v, current %+v", mode, i, a, b)
				}
			}
			var devOld, devCur *deviceView
			for i, d := range oldView.Devices {
				switch d.ID {
				case oldID:
					devOld = &oldView.Devices[i]
				case curID:
					devCur = &oldView.Devices[i]
				}
			}
			if devOld == nil || devCur == nil {
				t.Fatalf("ListDevices (frozen client) lacks %s or %s: %+v", oldID, curID, oldView.Devices)
			}
			// As sent by the frozen client (testdata/oldclient/main.go).
			wantMode := map[string]string{"raw": "MODE_RAW", "summary": "MODE_SUMMARY"}[mode]
			if devOld.Model != "frozen-v1" || devOld.Firmware != "round1-baseline" || devOld.Mode != wantMode || devOld.Labels["bed"] != "frozen 7" ||
				devOld.LastSequence != n+1 || devOld.Battery != 55 || devOld.Connected {
				t.Errorf("frozen %s device as listed: %+v", mode, *devOld)
			}
			c := *devCur
			c.ID = devOld.ID
			if !reflect.DeepEqual(*devOld, c) {
				t.Errorf("%s: the frozen device is listed as %+v, the current one as %+v", mode, *devOld, *devCur)
			}

			switch mode {
			case "summary":
				checkSummaryStored(t, recs, oldView)
			case "raw":
				valid := 0
				for _, p := range oldView.Points {
					if p.SpO2 != nil {
						valid++
					}
					if p.Source != "SOURCE_GATEWAY" {
						t.Errorf("raw point at %d: source %s, want SOURCE_GATEWAY", p.TimeMS, p.Source)
					}
				}
				// 40.5 s of samples: a point per second, most with SpO2 once the estimator settled.
				if len(oldView.Points) < 35 || valid < 10 {
					t.Errorf("raw: %d points stored, %d with SpO2; want >= 35 and >= 10", len(oldView.Points), valid)
				}
			}
		})
	}
}

// checkSummaryStored compares the summary device's trend and episode with
// the values it sent (the recording): every second stored once, as sent.
func checkSummaryStored(t *testing.T, recs []recorded, v fleetReport) {
	t.Helper()
	sent := map[int64]*pb.Summary{}
	for _, r := range recs {
		if s := r.msg.GetSummary(); s != nil && (r.tag == 'D' || r.tag == 'F') {
			sent[s.GetDeviceTimeUnixMs()] = s
		}
	}
	if len(v.Points) != len(sent) {
		t.Errorf("summary: %d points stored, %d seconds sent", len(v.Points), len(sent))
	}
	// The store keeps values as float32 (internal/store/records.go), so a stored value is the sent one rounded to float32.
	eq := func(stored, sent *float64) bool {
		return (stored == nil) == (sent == nil) && (stored == nil || *stored == float64(float32(*sent)))
	}
	str := func(v *float64) string {
		if v == nil {
			return "absent"
		}
		return fmt.Sprint(*v)
	}
	var minSpO2 float64 = 101
	for _, p := range v.Points {
		s := sent[p.TimeMS]
		if s == nil {
			t.Errorf("summary: a point at %d that was never sent", p.TimeMS)
			continue
		}
		if !eq(p.SpO2, s.Spo2Pct) || !eq(p.Pulse, s.PulseBpm) || !eq(p.PI, s.PiPct) || !eq(p.SQI, s.Quality) || p.Source != "SOURCE_DEVICE" {
			t.Errorf("summary: stored SpO2 %s, pulse %s, PI %s, SQI %s, source %s for the second at %d; sent %v",
				str(p.SpO2), str(p.Pulse), str(p.PI), str(p.SQI), p.Source, p.TimeMS, s)
		}
		if s.Spo2Pct != nil {
			minSpO2 = min(minSpO2, s.GetSpo2Pct())
		}
	}
	// The sent values fall to 84 % for 30 s against the 90 % limit of testProfile: one
	// medium-priority spo2_low episode, ended, whose lowest SpO2 is the lowest sent.
	var lows []episodeView
	for _, e := range v.Episodes {
		if e.Condition == "spo2_low" {
			lows = append(lows, e)
		}
	}
	if len(lows) != 1 {
		t.Fatalf("summary: spo2_low episodes %+v, want one", lows)
	}
	e := lows[0]
	if e.Priority != "PRIORITY_MEDIUM" || e.MinSpO2 == nil || *e.MinSpO2 != minSpO2 || e.Ended == 0 || e.Announced == 0 || e.Profile != "compat-test" {
		t.Errorf("summary: episode %+v, want medium, announced, ended, lowest SpO2 %v", e, minSpO2)
	}
}

// TestFrozenDeviceFollowsRedirect: in a sharded fleet, a round-1 device that
// belongs to another gateway is told where to go, in terms it understands.
func TestFrozenDeviceFollowsRedirect(t *testing.T) {
	oldClient(t)
	const other = "127.0.0.1:9" // never dialled: the device only reports the redirect
	var peers []string
	addr, _ := startGateway(t, func(o *gateway.Options, self string) {
		peers = []string{self, other}
		o.Peers, o.Self = peers, self
	})
	id := ""
	for i := 0; i < 1000 && id == ""; i++ {
		if c := fmt.Sprintf("frozen-away-%d", i); shard.Owner(c, peers) == other {
			id = c
		}
	}
	if id == "" {
		t.Fatal("no device id of the other gateway among 1000")
	}
	var rep deviceReport
	runOld(t, &rep, "device", "-addr", addr, "-id", id, "-mode", "summary", "-start-ms", fmt.Sprint(time.Now().Add(-time.Minute).UnixMilli()))
	if rep.Redirect == nil || rep.Redirect.Address != other || rep.Welcome != nil || rep.DataSent != 0 {
		t.Errorf("frozen device %s: %+v, want a redirect to %s and nothing sent", id, rep, other)
	}
}

// TestCapabilitiesNegotiation: names a gateway does not know are ignored (the
// stream works with baseline behaviour and the welcome lists none); a
// malformed name is rejected naming the field and the bound.
func TestCapabilitiesNegotiation(t *testing.T) {
	if testing.Short() {
		t.Skip("runs a gateway; skipped with -short")
	}
	_, conn := startGateway(t, nil)
	dial := func(caps []string) (pb.IngestService_ConnectClient, *pb.ConnectResponse) {
		ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
		t.Cleanup(cancel)
		st, err := pb.NewIngestServiceClient(conn).Connect(ctx)
		if err != nil {
			t.Fatal(err)
		}
		in := &pb.Introduction{DeviceId: "caps-1", Mode: pb.Mode_MODE_SUMMARY, Capabilities: caps}
		if err := st.Send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Introduction{Introduction: in}}); err != nil {
			t.Fatal(err)
		}
		m, err := st.Recv()
		if err != nil {
			t.Fatal(err)
		}
		return st, m
	}

	_, m := dial([]string{"BAD name"})
	if r := m.GetRejection(); r == nil || r.GetReason() != pb.RejectReason_REJECT_REASON_INVALID_FIELD || r.GetField() != "introduction.capabilities" {
		t.Errorf("a malformed capability name: got %v, want an INVALID_FIELD rejection of introduction.capabilities", m)
	}

	st, m := dial([]string{"some-future-behaviour", "another.one"})
	w := m.GetWelcome()
	if w == nil || len(w.GetCapabilities()) != 0 {
		t.Fatalf("unknown capabilities: got %v, want a welcome listing none", m)
	}
	spo2 := 97.0
	if err := st.Send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Summary{Summary: &pb.Summary{
		Sequence: 1, DeviceTimeUnixMs: time.Now().Add(-time.Minute).UnixMilli(), Spo2Pct: &spo2}}}); err != nil {
		t.Fatal(err)
	}
	for {
		m, err := st.Recv()
		if err != nil {
			t.Fatalf("waiting for the acknowledgement: %v", err)
		}
		if r := m.GetRejection(); r != nil {
			t.Fatalf("rejected: %v", r)
		}
		if m.GetAck().GetThroughSequence() == 1 {
			break
		}
	}
	st.CloseSend()
}
