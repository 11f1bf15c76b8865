package alarms

import (
	"bytes"
	"os"
	"path/filepath"
	"strings"
	"testing"
)

// The hand-worked trend files in testdata reproduce every rule of the replay
// contract (docs/contracts.md, "Alarm profile file"); each expected
// row is worked out in the comments at the top of the trend file.
func TestReplayHandWorkedFiles(t *testing.T) {
	for _, name := range []string{"ward-replay", "desat-replay"} {
		t.Run(name, func(t *testing.T) {
			p, err := LoadProfile(filepath.Join("testdata", name+".yaml"))
			if err != nil {
				t.Fatal(err)
			}
			f, err := os.Open(filepath.Join("testdata", name+".csv"))
			if err != nil {
				t.Fatal(err)
			}
			defer f.Close()
			trends, err := ReadTrendCSV(f)
			if err != nil {
				t.Fatal(err)
			}
			eps, err := ReplayTrends(p, trends)
			if err != nil {
				t.Fatal(err)
			}
			var got bytes.Buffer
			if err := WriteEpisodesCSV(&got, eps); err != nil {
				t.Fatal(err)
			}
			want, err := os.ReadFile(filepath.Join("testdata", name+".expected.csv"))
			if err != nil {
				t.Fatal(err)
			}
			if got.String() != string(want) {
				t.Errorf("replay output differs from the hand-worked episodes\ngot:\n%s\nwant:\n%s", got.String(), want)
			}
		})
	}
}

func TestReadTrendCSVErrors(t *testing.T) {
	for _, tc := range []struct{ name, in, want string }{
		{"empty", "", "empty input"},
		{"no t_s column", "device,spo2_pct\na,90\n", "no t_s column"},
		{"bad time", "t_s,spo2_pct\nx,90\n", `line 2: t_s "x", want a finite number`},
		{"spo2 above 100", "t_s,spo2_pct\n1,101\n", `line 2: spo2_pct "101", want a number in [0, 100] or empty`},
		{"sqi above 1", "t_s,spo2_pct,sqi\n1,90,1.5\n", `line 2: sqi "1.5", want a number in [0, 1]`},
		{"time not increasing", "t_s,device,spo2_pct\n1,a,90\n2,b,90\n1,a,91\n", `line 4: t_s 1 for device "a", want after 1`},
		{"duplicate column", "t_s,spo2_pct,spo2_pct\n", "column \"spo2_pct\" twice"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			_, err := ReadTrendCSV(strings.NewReader(tc.in))
			if err == nil || !strings.Contains(err.Error(), tc.want) {
				t.Fatalf("error %v, want it to contain %q", err, tc.want)
			}
		})
	}
}

func TestReadTrendCSVOneStreamWithoutDevice(t *testing.T) {
	// docs/contracts.md, "CSV formats": device may be empty for one stream; columns in any order.
	trends, err := ReadTrendCSV(strings.NewReader("spo2_pct,t_s,extra\n95,0,x\n,1,y\n0,2,z\n"))
	if err != nil {
		t.Fatal(err)
	}
	if len(trends) != 1 || trends[0].Device != "" || len(trends[0].Samples) != 3 {
		t.Fatalf("trends = %+v", trends)
	}
	s := trends[0].Samples
	if s[0].SpO2 != 95 || s[1].SpO2 == s[1].SpO2 || s[0].Pulse == s[0].Pulse {
		t.Errorf("samples = %+v, want 95, then missing; pulse missing", s)
	}
}
