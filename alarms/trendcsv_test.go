package alarms

import (
	"bytes"
	"encoding/csv"
	"errors"
	"fmt"
	"io"
	"math"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"

	"pgregory.net/rapid"
)

// The reference reader below is ReadTrendCSV as it was before the
// allocation-free reader: encoding/csv and strconv.ParseFloat per cell. The
// tests check that the fast reader gives the same trends and the same
// errors.

// Trend CSV columns (CONTRACT).
var refTrendColumns = []string{"t_s", "device", "spo2_pct", "pulse_bpm", "pi_pct", "sqi"}

// trend CSV bounds per value column: a value outside is an error; spo2_pct
// 0 means "no reading" and is kept as missing.
var refTrendBounds = map[string][2]float64{
	"spo2_pct": {0, 100}, "pulse_bpm": {0, 350}, "pi_pct": {0, 100}, "sqi": {0, 1},
}

// refReadTrendCSV reads the replay/tune trend format:
// t_s,device,spo2_pct,pulse_bpm,pi_pct,sqi with a header row (columns in any
// order; t_s and spo2_pct required, the others optional, unknown columns
// ignored). Empty cells are missing values; an empty or absent device is the
// stream "". Rows of different devices may interleave; each device's times
// must increase. Devices are returned in order of first appearance. Errors
// name the line, the column and the bound.
func refReadTrendCSV(r io.Reader) ([]Trend, error) {
	cr := csv.NewReader(r)
	cr.FieldsPerRecord = -1
	cr.ReuseRecord = true
	cr.Comment = '#'
	head, err := cr.Read()
	if err != nil {
		if errors.Is(err, io.EOF) {
			return nil, errors.New("trend csv: empty input, want a header row t_s,device,spo2_pct,pulse_bpm,pi_pct,sqi")
		}
		return nil, fmt.Errorf("trend csv: header: %w", err)
	}
	col := map[string]int{}
	for i, h := range head {
		h = strings.TrimSpace(strings.TrimPrefix(h, "\ufeff"))
		if _, dup := col[h]; dup {
			return nil, fmt.Errorf("trend csv: header: column %q twice", h)
		}
		col[h] = i
	}
	for _, need := range []string{"t_s", "spo2_pct"} {
		if _, ok := col[need]; !ok {
			return nil, fmt.Errorf("trend csv: header: no %s column, want %s", need, strings.Join(refTrendColumns, ","))
		}
	}
	var trends []Trend
	byDev := map[string]int{}
	for {
		rec, err := cr.Read()
		if errors.Is(err, io.EOF) {
			break
		}
		if err != nil {
			return nil, fmt.Errorf("trend csv: %w", err)
		}
		line, _ := cr.FieldPos(0)
		cell := func(name string) string {
			if i, ok := col[name]; ok && i < len(rec) {
				return strings.TrimSpace(rec[i])
			}
			return ""
		}
		ts := cell("t_s")
		t, err := strconv.ParseFloat(ts, 64)
		if err != nil || math.IsNaN(t) || math.IsInf(t, 0) {
			return nil, fmt.Errorf("trend csv: line %d: t_s %q, want a finite number of seconds", line, ts)
		}
		s := Sample{T: t}
		for _, f := range []struct {
			name string
			dst  *float64
		}{{"spo2_pct", &s.SpO2}, {"pulse_bpm", &s.Pulse}, {"pi_pct", &s.PI}, {"sqi", &s.SQI}} {
			*f.dst = math.NaN()
			c := cell(f.name)
			if c == "" {
				continue
			}
			v, err := strconv.ParseFloat(c, 64)
			b := refTrendBounds[f.name]
			if err != nil || !(v >= b[0] && v <= b[1]) {
				return nil, fmt.Errorf("trend csv: line %d: %s %q, want a number in [%g, %g] or empty", line, f.name, c, b[0], b[1])
			}
			*f.dst = v
		}
		dev := cell("device")
		i, ok := byDev[dev]
		if !ok {
			i = len(trends)
			byDev[dev] = i
			trends = append(trends, Trend{Device: dev})
		}
		tr := &trends[i]
		if n := len(tr.Samples); n > 0 && !(t > tr.Samples[n-1].T) {
			return nil, fmt.Errorf("trend csv: line %d: t_s %s for device %q, want after %s (times must increase per device)",
				line, ts, dev, strconv.FormatFloat(tr.Samples[n-1].T, 'f', -1, 64))
		}
		tr.Samples = append(tr.Samples, s)
	}
	return trends, nil
}

// sameTrends reports whether a and b hold the same devices and bit-identical samples.
func sameTrends(a, b []Trend) error {
	if len(a) != len(b) {
		return fmt.Errorf("%d trends, reference %d", len(a), len(b))
	}
	bits := func(f float64) uint64 {
		if f != f {
			return 1 // every NaN alike
		}
		return math.Float64bits(f)
	}
	for i := range a {
		if a[i].Device != b[i].Device || len(a[i].Samples) != len(b[i].Samples) {
			return fmt.Errorf("trend %d: %q with %d samples, reference %q with %d", i, a[i].Device, len(a[i].Samples), b[i].Device, len(b[i].Samples))
		}
		for j, s := range a[i].Samples {
			r := b[i].Samples[j]
			if bits(s.T) != bits(r.T) || bits(s.SpO2) != bits(r.SpO2) || bits(s.Pulse) != bits(r.Pulse) || bits(s.PI) != bits(r.PI) || bits(s.SQI) != bits(r.SQI) {
				return fmt.Errorf("trend %q sample %d: %+v, reference %+v", a[i].Device, j, s, r)
			}
		}
	}
	return nil
}

// fataler is what agreeWithReference needs of *testing.T and *rapid.T.
type fataler interface {
	Helper()
	Fatalf(format string, args ...any)
}

// agreeWithReference fails t when ReadTrendCSV and the reference reader
// differ on data (trends, or error text).
func agreeWithReference(t fataler, data []byte) {
	t.Helper()
	for _, block := range []int{4 << 20, 64, 17} { // parallel blocks of a few lines, or one
		trendBlock = block
		agreeWithReferenceOnce(t, data)
	}
	trendBlock = 4 << 20
}

func agreeWithReferenceOnce(t fataler, data []byte) {
	t.Helper()
	got, err := ReadTrendCSV(bytes.NewReader(data))
	want, werr := refReadTrendCSV(bytes.NewReader(data))
	if (err == nil) != (werr == nil) || (err != nil && err.Error() != werr.Error()) {
		t.Fatalf("error %v, reference %v\ninput %q", err, werr, data)
	}
	if err == nil {
		if e := sameTrends(got, want); e != nil {
			t.Fatalf("%v\ninput %q", e, data)
		}
	}
}

func TestReadTrendCSVAgreesWithEncodingCSV(t *testing.T) {
	// The replay test files (hand-worked) and edge cases of RFC 4180 CSV
	// (common practice: quotes, CRLF, comments, blank lines, a BOM).
	for _, name := range []string{"ward-replay.csv", "desat-replay.csv"} {
		b, err := os.ReadFile(filepath.Join("testdata", name))
		if err != nil {
			t.Fatal(err)
		}
		agreeWithReference(t, b)
	}
	for _, in := range []string{
		"", "\n", "# caution\n", "t_s,spo2_pct", "t_s,spo2_pct\n", "\ufefft_s,device,spo2_pct\n1,a,90\n",
		"# caution\nt_s,device,spo2_pct,pulse_bpm,pi_pct,sqi\n0,a,97,70,1.5,0.9\n1,a,,,,\n\n# note\n2,b,96.5,71,1e-1,1\n",
		"t_s,spo2_pct\r\n0,95\r\n1,94\r\n",
		"t_s,spo2_pct\n0,95\n1,\"94\"\n2,93\n",
		"t_s,device,spo2_pct\n0,\"a,b\",95\n1,\"a\nb\",94\n2,x\"y,93\n",
		"t_s,spo2_pct\n0,95\n1,9\"4\n",
		"t_s,spo2_pct\n0,95\r",
		"t_s,spo2_pct\n0,95\n1,94\r2,93\n",
		"t_s,spo2_pct\n 0 , 95 \n\t1\t,94\n",
		"t_s,spo2_pct\n1.7646500005e+09,95\n1764650001,94.25\n",
		"t_s,spo2_pct\n0x10,95\n", "t_s,spo2_pct\ninf,95\n", "t_s,spo2_pct\nNaN,95\n", "t_s,spo2_pct\n1e400,95\n",
		"t_s,spo2_pct\n0,1_0\n", "t_s,spo2_pct\n0,.5\n1,5.\n2,+5\n3,-0\n", "t_s,spo2_pct\n0,.\n", "t_s,spo2_pct\n0,1e\n",
		"t_s,spo2_pct\n-0,95\n0,95\n", "t_s,spo2_pct\n0.1000000000000000055511151231257827,95\n",
		"t_s,spo2_pct,spo2_pct\n", "t_s,device\n", "t_s,spo2_pct\n0,95,extra,cells\n1\n",
	} {
		agreeWithReference(t, []byte(in))
	}
}

// TestReadTrendCSVExactNumbers: every float64 written the ways the project
// writes trend values (strconv 'g' and 'f' shortest, as tune's
// WriteTrendCSV and export do) reads back bit-identical, whichever path
// parses it.
func TestReadTrendCSVExactNumbers(t *testing.T) {
	rapid.Check(t, func(t *rapid.T) {
		v := rapid.OneOf(
			rapid.Float64Range(0, 100),
			rapid.Float64Range(1e9, 2e9),
			rapid.Float64Range(0, 1),
			rapid.Float64(),
			rapid.Map(rapid.IntRange(0, 2000000000), func(i int) float64 { return float64(i) / 1000 }),
			rapid.Map(rapid.IntRange(0, 100000), func(i int) float64 { return float64(i) / 10 }),
		).Draw(t, "v")
		for _, fmtc := range []byte{'g', 'f', 'e'} {
			s := strconv.FormatFloat(v, fmtc, -1, 64)
			got, ok := parseFloat([]byte(s))
			want, err := strconv.ParseFloat(s, 64)
			if ok != (err == nil) || math.Float64bits(got) != math.Float64bits(want) {
				t.Fatalf("parseFloat(%q) = %v %v, strconv %v %v", s, got, ok, want, err)
			}
		}
	})
}

// TestReadTrendCSVRandomFiles: random trend files (numbers, blanks,
// spaces, comments, CRLF, quotes, bad values) read alike by both readers.
func TestReadTrendCSVRandomFiles(t *testing.T) {
	rapid.Check(t, func(t *rapid.T) {
		var b strings.Builder
		b.WriteString(rapid.SampledFrom([]string{"", "# caution\n", "\ufeff"}).Draw(t, "pre"))
		b.WriteString(rapid.SampledFrom([]string{"t_s,device,spo2_pct,pulse_bpm,pi_pct,sqi", "device,t_s,spo2_pct", "spo2_pct,t_s,sqi,x"}).Draw(t, "head"))
		b.WriteString("\n")
		tm := 0.0
		for i := range rapid.IntRange(0, 40).Draw(t, "rows") {
			tm += rapid.SampledFrom([]float64{0.5, 1, 0.001, 0, -1}).Draw(t, "dt")
			cells := []string{strconv.FormatFloat(tm, 'g', -1, 64), rapid.SampledFrom([]string{"a", "b", "", " a"}).Draw(t, "dev")}
			for k := range 4 {
				cells = append(cells, rapid.SampledFrom([]string{"", "95", "97.5", "0.81", "101", "x", "1e1", " 60 ", "\"7\"", "-1"}).Draw(t, fmt.Sprint("c", i, k)))
			}
			b.WriteString(strings.Join(cells[:rapid.IntRange(1, 6).Draw(t, "n")], ","))
			b.WriteString(rapid.SampledFrom([]string{"\n", "\r\n", "\n\n", "\n# c\n"}).Draw(t, "eol"))
		}
		agreeWithReference(t, []byte(b.String()))
	})
}

func FuzzReadTrendCSVAgrees(f *testing.F) {
	f.Add([]byte("t_s,spo2_pct\n0,95\n1,\n"))
	f.Add([]byte("t_s,device,spo2_pct\n0,\"a\"\"b\",95\n"))
	f.Fuzz(func(t *testing.T, data []byte) { agreeWithReference(t, data) })
}

// trendCSVBytes is a trend file of devices x seconds at 1 Hz in the format
// tune writes (values as strconv 'g' shortest).
func trendCSVBytes(devices, seconds int) []byte {
	var b bytes.Buffer
	b.WriteString("# caution line\nt_s,device,spo2_pct,pulse_bpm,pi_pct,sqi\n")
	row := make([]byte, 0, 64)
	for s := range seconds {
		for d := range devices {
			t := float64((1764600000+s)*10+d%10) / 10 // Unix seconds to 0.1 s, as the project writes them
			row = strconv.AppendFloat(row[:0], t, 'g', -1, 64)
			row = fmt.Appendf(row, ",dev-%03d,", d)
			row = strconv.AppendFloat(row, 90+float64((s*7+d)%90)/10, 'g', -1, 64)
			row = append(row, ',')
			row = strconv.AppendFloat(row, 60+float64((s+d)%40), 'g', -1, 64)
			row = append(row, ',')
			row = strconv.AppendFloat(row, float64((s*3+d)%500)/100, 'g', -1, 64)
			row = append(row, ',')
			row = strconv.AppendFloat(row, float64((s+d)%100)/100, 'g', -1, 64)
			row = append(row, '\n')
			b.Write(row)
		}
	}
	return b.Bytes()
}

// BenchmarkReadTrendCSV reads a trend file in tune's format (10 devices x
// 1 h at 1 Hz, 1.6 MB); MB/s is input bytes per second. Reference is the
// encoding/csv reader it replaced, for the ratio.
func BenchmarkReadTrendCSV(b *testing.B) {
	data := trendCSVBytes(10, 3600)
	for _, bc := range []struct {
		name string
		read func(io.Reader) ([]Trend, error)
	}{{"fast", ReadTrendCSV}, {"reference", refReadTrendCSV}} {
		b.Run(bc.name, func(b *testing.B) {
			b.SetBytes(int64(len(data)))
			b.ReportAllocs()
			for b.Loop() {
				if _, err := bc.read(bytes.NewReader(data)); err != nil {
					b.Fatal(err)
				}
			}
		})
	}
}
