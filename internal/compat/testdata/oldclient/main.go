// Command oldclient is a frozen client of the pulsefleet v1 protocol as
// released in round 1: a device (IngestService) and an operator's script
// (FleetService) built only from the generated code of that release, which
// sits next to it (pulsefleet/v1, generated from ../v1baseline and never
// regenerated). Package compat builds it and runs it against the current
// gateway to prove that firmware and scripts already in the field keep
// working as the protocol grows.
//
// Do not change what it sends or how it reads answers when the protocol
// changes: it stands for devices that cannot be updated. It imports nothing
// from the project except its own frozen generated code.
//
//	oldclient device -addr HOST:PORT -id ID -mode raw|summary -start-ms MS -record FILE
//	oldclient fleet -addr HOST:PORT -device ID -from MS -to MS
//
// Both print one JSON report on standard output (what the client understood,
// in its own terms) and exit non-zero only when they could not run at all.
package main

import (
	"bufio"
	"context"
	"encoding/binary"
	"encoding/json"
	"errors"
	"flag"
	"fmt"
	"io"
	"math"
	"os"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials/insecure"
	"google.golang.org/grpc/status"
	"google.golang.org/protobuf/proto"

	pb "github.com/pulsefleet/pulsefleet/internal/compat/testdata/oldclient/pulsefleet/v1"
)

func main() {
	if len(os.Args) < 2 {
		fmt.Fprintln(os.Stderr, "usage: oldclient device|fleet [flags]")
		os.Exit(2)
	}
	var rep any
	var err error
	switch os.Args[1] {
	case "device":
		rep, err = runDevice(os.Args[2:])
	case "fleet":
		rep, err = runFleet(os.Args[2:])
	default:
		err = fmt.Errorf("unknown command %q, want device or fleet", os.Args[1])
	}
	if err != nil {
		fmt.Fprintln(os.Stderr, "oldclient:", err)
		os.Exit(1)
	}
	enc := json.NewEncoder(os.Stdout)
	enc.SetIndent("", "  ")
	if err := enc.Encode(rep); err != nil {
		fmt.Fprintln(os.Stderr, "oldclient:", err)
		os.Exit(1)
	}
}

// Record tags: what a recorded message is for, so the same conversation can
// be replayed by a current client. Each record is one tag byte, a uvarint
// length and the message's wire bytes.
const (
	TagIntroduction = 'I' // wait for the welcome (or a redirect)
	TagStatus       = 'S' // never answered
	TagData         = 'D' // sequenced data; all are acknowledged
	TagReject       = 'R' // a message the gateway must reject; wait for the rejection
	TagFinal        = 'F' // a last valid message; wait for its acknowledgement
)

// DeviceReport is what the device understood.
type DeviceReport struct {
	Welcome      *WelcomeReport  `json:"welcome,omitempty"`
	Redirect     *RedirectReport `json:"redirect,omitempty"`
	StreamError  string          `json:"stream_error,omitempty"` // gRPC status code name and message
	Configs      int             `json:"configs"`
	DataSent     int             `json:"data_sent"` // distinct data messages, 1..N
	Acked        uint64          `json:"acked"`     // highest acknowledged sequence
	RateLimited  int             `json:"rate_limited"`
	BulkRejected int             `json:"bulk_rejected"` // other rejections while sending the data (stale resends after a rate limit)
	Rejections   []RejectReport  `json:"rejections"`    // answers to the messages sent to be rejected, in order
}

type WelcomeReport struct {
	ResumeAfter  uint64 `json:"resume_after"`
	HasTime      bool   `json:"has_time"`
	HasSession   bool   `json:"has_session"`
	Calibration  string `json:"calibration"`
	NoticeLength int    `json:"notice_length"`
}

type RedirectReport struct {
	Address string `json:"address"`
	Detail  string `json:"detail"`
}

type RejectReport struct {
	Sequence uint64 `json:"sequence"`
	Reason   string `json:"reason"` // the enum value's name as this client knows it
	Field    string `json:"field"`
}

func runDevice(args []string) (*DeviceReport, error) {
	fs := flag.NewFlagSet("device", flag.ContinueOnError)
	addr := fs.String("addr", "", "gateway gRPC address")
	id := fs.String("id", "", "device id")
	mode := fs.String("mode", "raw", "raw or summary")
	startMS := fs.Int64("start-ms", 0, "device time of the first data, ms since the Unix epoch")
	record := fs.String("record", "", "file to record the sent messages in (optional)")
	if err := fs.Parse(args); err != nil {
		return nil, err
	}
	if *addr == "" || *id == "" || *startMS <= 0 || (*mode != "raw" && *mode != "summary") {
		return nil, errors.New("device: -addr, -id, -mode raw|summary and -start-ms are required")
	}
	var rec *recorder
	if *record != "" {
		f, err := os.Create(*record)
		if err != nil {
			return nil, err
		}
		defer f.Close()
		rec = &recorder{w: bufio.NewWriter(f)}
		defer rec.w.Flush()
	}
	conn, err := grpc.NewClient(*addr, grpc.WithTransportCredentials(insecure.NewCredentials()))
	if err != nil {
		return nil, err
	}
	defer conn.Close()
	ctx, cancel := context.WithTimeout(context.Background(), 2*time.Minute)
	defer cancel()
	st, err := pb.NewIngestServiceClient(conn).Connect(ctx)
	if err != nil {
		return nil, err
	}
	d := &device{st: st, rec: rec, rep: &DeviceReport{Rejections: []RejectReport{}}, in: make(chan *pb.ConnectResponse, 64)}
	go d.read()
	return d.rep, d.run(*id, *mode, *startMS)
}

type recorder struct{ w *bufio.Writer }

func (r *recorder) add(tag byte, m proto.Message) error {
	if r == nil {
		return nil
	}
	b, err := proto.Marshal(m)
	if err != nil {
		return err
	}
	r.w.WriteByte(tag)
	r.w.Write(binary.AppendUvarint(nil, uint64(len(b))))
	_, err = r.w.Write(b)
	return err
}

type device struct {
	st       pb.IngestService_ConnectClient
	rec      *recorder
	rep      *DeviceReport
	in       chan *pb.ConnectResponse
	endErr   error
	probing  bool   // sending the messages that must be rejected
	rateFrom uint64 // lowest sequence refused by the rate limit since the last resend (0 = none)
	lastBulk uint64 // sequence of the last data message rejected for another reason
}

func (d *device) read() {
	for {
		m, err := d.st.Recv()
		if err != nil {
			d.endErr = err
			close(d.in)
			return
		}
		d.in <- m
	}
}

func (d *device) send(tag byte, m *pb.ConnectRequest) error {
	if err := d.rec.add(tag, m); err != nil {
		return err
	}
	return d.st.Send(m)
}

// next waits up to wait for the next answer and books it in the report.
// ok is false when the stream ended (the reason is in the report) or nothing
// came within a minute; m is nil with ok true when a poll (wait 0) found
// nothing.
func (d *device) next(wait time.Duration) (m *pb.ConnectResponse, ok bool) {
	if wait == 0 {
		select {
		case m, open := <-d.in:
			return d.got(m, open)
		default:
			return nil, true
		}
	}
	select {
	case m, open := <-d.in:
		return d.got(m, open)
	case <-time.After(wait):
		d.rep.StreamError = "client: no answer within " + wait.String()
		return nil, false
	}
}

func (d *device) got(m *pb.ConnectResponse, open bool) (*pb.ConnectResponse, bool) {
	if !open {
		if !errors.Is(d.endErr, io.EOF) {
			s := status.Convert(d.endErr)
			d.rep.StreamError = s.Code().String() + ": " + s.Message()
		}
		return nil, false
	}
	d.book(m)
	return m, true
}

func (d *device) book(m *pb.ConnectResponse) {
	switch k := m.Kind.(type) {
	case *pb.ConnectResponse_Ack:
		d.rep.Acked = max(d.rep.Acked, k.Ack.GetThroughSequence())
	case *pb.ConnectResponse_Config:
		d.rep.Configs++
	case *pb.ConnectResponse_Rejection:
		r := k.Rejection
		switch {
		case r.GetReason() == pb.RejectReason_REJECT_REASON_RATE_LIMITED:
			d.rep.RateLimited++
			if d.rateFrom == 0 || r.GetSequence() < d.rateFrom {
				d.rateFrom = r.GetSequence()
			}
		case !d.probing:
			d.rep.BulkRejected++ // stale resends after a rate limit
			d.lastBulk = r.GetSequence()
		default:
			d.rep.Rejections = append(d.rep.Rejections, RejectReport{Sequence: r.GetSequence(), Reason: r.GetReason().String(), Field: r.GetField()})
		}
	}
}

const answerWait = time.Minute

func (d *device) run(id, mode string, startMS int64) error {
	raw := mode == "raw"
	in := &pb.Introduction{DeviceId: id, Model: "frozen-v1", Firmware: "round1-baseline", Labels: map[string]string{"bed": "frozen 7"}}
	if raw {
		in.Mode, in.AdcBits = pb.Mode_MODE_RAW, 16
	} else {
		in.Mode = pb.Mode_MODE_SUMMARY
	}
	if err := d.send(TagIntroduction, &pb.ConnectRequest{Kind: &pb.ConnectRequest_Introduction{Introduction: in}}); err != nil {
		return err
	}
	for d.rep.Welcome == nil {
		m, ok := d.next(answerWait)
		if !ok {
			return nil
		}
		if w := m.GetWelcome(); w != nil {
			d.rep.Welcome = &WelcomeReport{ResumeAfter: w.GetResumeAfterSequence(), HasTime: w.GetGatewayTimeUnixMs() > 0,
				HasSession: w.GetSessionId() != "", Calibration: w.GetCalibration(), NoticeLength: len(w.GetNotice())}
		}
		if r := m.GetRedirect(); r != nil {
			d.rep.Redirect = &RedirectReport{Address: r.GetAddress(), Detail: r.GetDetail()}
			d.st.CloseSend()
			for _, ok := d.next(answerWait); ok; _, ok = d.next(answerWait) { // the gateway ends the stream
			}
			return nil
		}
	}
	status := &pb.DeviceStatus{DeviceTimeUnixMs: startMS, BatteryPct: 55, TemperatureC: 31.5, LinkQuality: 0.9}
	if err := d.send(TagStatus, &pb.ConnectRequest{Kind: &pb.ConnectRequest_Status{Status: status}}); err != nil {
		return err
	}

	data := summaries(startMS)
	if raw {
		data = rawChunks(startMS)
	}
	n := uint64(len(data))
	d.rep.DataSent = len(data)
	for _, m := range data {
		if err := d.rec.add(TagData, m); err != nil {
			return err
		}
	}
	// Send everything; after a rate-limited message, pause and resend from
	// it, as the v1 contract asks.
	from := d.rep.Welcome.ResumeAfter + 1
	for d.rep.Acked < n {
		for s := from; s <= n; s++ {
			if err := d.st.Send(data[s-1]); err != nil {
				return err
			}
		}
		d.rateFrom = 0
		for d.rep.Acked < n && d.rateFrom == 0 && d.lastBulk != n {
			if _, ok := d.next(answerWait); !ok {
				return nil
			}
		}
		if d.rep.Acked >= n {
			break
		}
		if d.rateFrom == 0 { // the last message was rejected: nothing more will be acknowledged
			return nil
		}
		time.Sleep(200 * time.Millisecond)
		for m, ok := d.next(0); m != nil; m, ok = d.next(0) {
			if !ok {
				return nil
			}
		}
		from = max(d.rateFrom, d.rep.Acked+1)
	}

	// Messages the gateway must reject; the stream goes on.
	var bad, wrong *pb.ConnectRequest
	if raw {
		c := proto.Clone(data[0]).(*pb.ConnectRequest).GetRawChunk()
		c.Sequence, c.DeviceTimeUnixMs, c.SampleRateHz = n+1, c.DeviceTimeUnixMs+int64(n)*500, 0
		bad = &pb.ConnectRequest{Kind: &pb.ConnectRequest_RawChunk{RawChunk: c}}
		wrong = &pb.ConnectRequest{Kind: &pb.ConnectRequest_Summary{Summary: &pb.Summary{Sequence: n + 1, DeviceTimeUnixMs: startMS + int64(n)*1000}}}
	} else {
		spo2 := 150.0
		bad = &pb.ConnectRequest{Kind: &pb.ConnectRequest_Summary{Summary: &pb.Summary{Sequence: n + 1, DeviceTimeUnixMs: startMS + int64(n)*1000, Spo2Pct: &spo2}}}
		wrong = &pb.ConnectRequest{Kind: &pb.ConnectRequest_RawChunk{RawChunk: &pb.RawChunk{Sequence: n + 1, DeviceTimeUnixMs: startMS + int64(n)*1000,
			SampleRateHz: 100, Red: []uint32{1000}, Ir: []uint32{1000}}}}
	}
	d.probing = true
	for _, m := range []*pb.ConnectRequest{
		data[0], // a resend of something already durable: stale
		bad,     // a field out of its bound
		wrong,   // a data kind the introduced mode does not send
		{Kind: &pb.ConnectRequest_Introduction{Introduction: in}}, // a second introduction
	} {
		if err := d.send(TagReject, m); err != nil {
			return err
		}
		want := len(d.rep.Rejections) + 1
		for len(d.rep.Rejections) < want {
			if _, ok := d.next(answerWait); !ok {
				return nil
			}
		}
	}
	final := proto.Clone(data[len(data)-1]).(*pb.ConnectRequest)
	if raw {
		c := final.GetRawChunk()
		c.Sequence, c.DeviceTimeUnixMs = n+1, c.DeviceTimeUnixMs+500
	} else {
		s := final.GetSummary()
		s.Sequence, s.DeviceTimeUnixMs = n+1, s.DeviceTimeUnixMs+1000
	}
	if err := d.send(TagFinal, final); err != nil {
		return err
	}
	for d.rep.Acked < n+1 {
		if _, ok := d.next(answerWait); !ok {
			return nil
		}
	}
	d.st.CloseSend()
	for _, ok := d.next(answerWait); ok; _, ok = d.next(answerWait) {
	}
	return nil
}

// summaries is 90 s of device values: 20 s at 97 %, 30 s at 84 % (a
// desaturation below a 90 % limit), 40 s at 96 %; the pulse varies a little,
// the second at 55-59 s has no valid SpO2 (absent, not zero).
func summaries(startMS int64) []*pb.ConnectRequest {
	var out []*pb.ConnectRequest
	for i := 0; i < 90; i++ {
		spo2 := 97.0
		switch {
		case i >= 20 && i < 50:
			spo2 = 84
		case i >= 50:
			spo2 = 96
		}
		pulse, pi, q := 70+float64(i%7), 2.5, 0.9
		s := &pb.Summary{Sequence: uint64(i + 1), DeviceTimeUnixMs: startMS + int64(i)*1000, Spo2Pct: &spo2, PulseBpm: &pulse, PiPct: &pi, Quality: &q}
		if i >= 55 && i < 60 {
			s.Spo2Pct = nil
		}
		out = append(out, &pb.ConnectRequest{Kind: &pb.ConnectRequest_Summary{Summary: s}})
	}
	return out
}

// rawChunks is 40 s of a plain synthetic pulse wave at 100 Hz, 72 per
// minute, in 50-sample chunks: the infrared channel modulated 2.5 % of its
// level, the red 1.7 % (a ratio of ratios near 0.7).
func rawChunks(startMS int64) []*pb.ConnectRequest {
	const rate, per, seconds = 100.0, 50, 40
	var out []*pb.ConnectRequest
	for k := 0; k < seconds*int(rate)/per; k++ {
		c := &pb.RawChunk{Sequence: uint64(k + 1), DeviceTimeUnixMs: startMS + int64(k*per)*10, SampleRateHz: rate, LedDriveMa: 20, Gain: 10}
		for j := 0; j < per; j++ {
			t := float64(k*per+j) / rate
			ph := 2 * math.Pi * 1.2 * t
			p := 0.6*math.Sin(ph) + 0.25*math.Sin(2*ph-0.8) + 0.1*math.Sin(3*ph-1.6) // one beat, steep rise
			c.Red = append(c.Red, uint32(30000*(1-0.0085*p)))
			c.Ir = append(c.Ir, uint32(40000*(1-0.0125*p)))
		}
		out = append(out, &pb.ConnectRequest{Kind: &pb.ConnectRequest_RawChunk{RawChunk: c}})
	}
	return out
}

// FleetReport is what an operator's script understood.
type FleetReport struct {
	Devices  []DeviceView  `json:"devices"`
	Points   []PointView   `json:"points"`
	Buckets  []BucketView  `json:"buckets"`
	Episodes []EpisodeView `json:"episodes"`
}

type DeviceView struct {
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

type PointView struct {
	TimeMS int64    `json:"t"`
	SpO2   *float64 `json:"spo2"`
	Pulse  *float64 `json:"pulse"`
	PI     *float64 `json:"pi"`
	SQI    *float64 `json:"sqi"`
	Ratio  *float64 `json:"ratio"`
	Flags  uint32   `json:"flags"`
	Source string   `json:"source"`
}

type BucketView struct {
	StartMS int64    `json:"start"`
	Points  uint32   `json:"points"`
	SpO2    StatView `json:"spo2"`
	Pulse   StatView `json:"pulse"`
}

type StatView struct {
	Count  uint32     `json:"n"`
	Values [3]float64 `json:"v"` // min, mean, max
}

type EpisodeView struct {
	ID        uint64   `json:"id"`
	Device    string   `json:"device"`
	Condition string   `json:"condition"`
	Priority  string   `json:"priority"`
	OnsetMS   int64    `json:"onset"`
	Announced int64    `json:"announced"`
	Ended     int64    `json:"ended"`
	MinSpO2   *float64 `json:"min_spo2"`
	Deficit   float64  `json:"deficit"` // field 10 of the baseline; 0 when the gateway no longer sends it
	Active    bool     `json:"active"`
	Profile   string   `json:"profile"`
}

func runFleet(args []string) (*FleetReport, error) {
	fs := flag.NewFlagSet("fleet", flag.ContinueOnError)
	addr := fs.String("addr", "", "gateway gRPC address")
	dev := fs.String("device", "", "device id for trend and episodes")
	from := fs.Int64("from", 0, "trend start, ms since the Unix epoch")
	to := fs.Int64("to", 0, "trend end, ms since the Unix epoch")
	if err := fs.Parse(args); err != nil {
		return nil, err
	}
	if *addr == "" || *dev == "" || *to <= *from {
		return nil, errors.New("fleet: -addr, -device and -from < -to are required")
	}
	conn, err := grpc.NewClient(*addr, grpc.WithTransportCredentials(insecure.NewCredentials()))
	if err != nil {
		return nil, err
	}
	defer conn.Close()
	ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
	defer cancel()
	fc := pb.NewFleetServiceClient(conn)
	rep := &FleetReport{Devices: []DeviceView{}, Points: []PointView{}, Buckets: []BucketView{}, Episodes: []EpisodeView{}}

	ld, err := fc.ListDevices(ctx, &pb.ListDevicesRequest{})
	if err != nil {
		return nil, fmt.Errorf("ListDevices: %w", err)
	}
	for _, d := range ld.GetDevices() {
		rep.Devices = append(rep.Devices, DeviceView{ID: d.GetDeviceId(), Model: d.GetModel(), Firmware: d.GetFirmware(), Mode: d.GetMode().String(),
			Labels: d.GetLabels(), Connected: d.GetConnected(), LastSequence: d.GetLastSequence(), Battery: d.GetBatteryPct(),
			Calibration: d.GetCalibration(), Profile: d.GetProfile(), Priority: d.GetAlarmPriority().String(), LatestTimeMS: d.GetLatest().GetTimeUnixMs()})
	}
	tr, err := fc.QueryTrend(ctx, &pb.QueryTrendRequest{DeviceId: *dev, FromUnixMs: *from, ToUnixMs: *to})
	if err != nil {
		return nil, fmt.Errorf("QueryTrend: %w", err)
	}
	for _, p := range tr.GetPoints() {
		rep.Points = append(rep.Points, PointView{TimeMS: p.GetTimeUnixMs(), SpO2: p.Spo2Pct, Pulse: p.PulseBpm, PI: p.PiPct, SQI: p.Sqi, Ratio: p.Ratio,
			Flags: p.GetFlags(), Source: p.GetSource().String()})
	}
	tb, err := fc.QueryTrend(ctx, &pb.QueryTrendRequest{DeviceId: *dev, FromUnixMs: *from, ToUnixMs: *to, StepMs: 10_000})
	if err != nil {
		return nil, fmt.Errorf("QueryTrend step 10 s: %w", err)
	}
	for _, b := range tb.GetBuckets() {
		rep.Buckets = append(rep.Buckets, BucketView{StartMS: b.GetStartUnixMs(), Points: b.GetPoints(), SpO2: stat(b.GetSpo2Pct()), Pulse: stat(b.GetPulseBpm())})
	}
	le, err := fc.ListEpisodes(ctx, &pb.ListEpisodesRequest{DeviceId: *dev})
	if err != nil {
		return nil, fmt.Errorf("ListEpisodes: %w", err)
	}
	for _, e := range le.GetEpisodes() {
		rep.Episodes = append(rep.Episodes, EpisodeView{ID: e.GetEpisodeId(), Device: e.GetDeviceId(), Condition: e.GetCondition(), Priority: e.GetPriority().String(),
			OnsetMS: e.GetOnsetUnixMs(), Announced: e.GetAnnouncedUnixMs(), Ended: e.GetEndedUnixMs(), MinSpO2: e.MinSpo2Pct, Deficit: e.GetDeficitPctS(),
			Active: e.GetActive(), Profile: e.GetProfile()})
	}
	return rep, nil
}

func stat(s *pb.Stat) StatView {
	return StatView{Count: s.GetCount(), Values: [3]float64{s.GetMin(), s.GetMean(), s.GetMax()}}
}
