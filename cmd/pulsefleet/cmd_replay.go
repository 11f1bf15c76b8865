package main

import (
	"context"
	"errors"
	"fmt"
	"github.com/pulsefleet/pulsefleet/internal/caution"
	"io"
	"io/fs"
	"os"
	"time"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/internal/participants"
	"github.com/pulsefleet/pulsefleet/internal/profiles"
)

const replaySummary = `Replay a recorded trend through an alarm profile and list the announced episodes.

Input (--in, "-" for stdin): CSV t_s,device,spo2_pct,pulse_bpm,pi_pct,sqi with a
header; empty cells are missing values; device may be empty for one stream.
Output (--out, default stdout): device,condition,priority,onset_s,announced_s,
escalated_s,ended_s,min_spo2_pct, one row per announced episode, by announced_s.
--profile is a profile file or a built-in profile name (adult-ward-pilot,
home-overnight).

--indices FILE (or - for stdout when --out is a file) adds a per-device
desaturation summary: events and ODI at drops of 3 and 4 points, T90 (% of
time with SpO2 < 90 %) and valid hours. Denominator: valid recording time
(time covered by samples with a valid SpO2, gaps over 5 s excluded), not
sleep time, which pulsefleet does not know (Whenn et al. 2024: the choice
moves ODI by about 21 %). Events: drop below the highest valid SpO2 of the
last --odi-baseline, lasting --odi-min-duration, ending when the drop is
under 1 point less than the depth.

--participant PID replays only the rows whose participant column is PID (the
stitched history that "trend --participant" and "export --format csv" write),
and --indices then gives one row per participant-night and device:
participant,night,night_from,night_to,device,valid_hours,... A night is the
local-time window --night (default 22:00-07:00, a team choice) in time zone
--tz (IANA name, default UTC), named by the local date it starts on; samples
outside every night are not scored. A prototype and a reference oximeter worn
at once are scored separately, never mixed.

Research tool, not a certified medical alarm.`

// replayOptions are the flags of `pulsefleet replay`.
type replayOptions struct {
	profile, in, out, indices string
	odiBaseline, odiMin       time.Duration
	participant, night, tz    string
}

func init() {
	register(command{
		name:    "replay",
		summary: replaySummary,
		run: func(ctx context.Context, args []string, s stdio) error {
			var o replayOptions
			fs := newFlagSet("replay", "--profile FILE|NAME --in TREND.csv [--out EPISODES.csv] [--indices FILE|-]", s.err)
			fs.StringVar(&o.profile, "profile", "", "alarm profile: a YAML file or a built-in name (required)")
			fs.StringVar(&o.in, "in", "", "trend CSV file, - for stdin (required)")
			fs.StringVar(&o.out, "out", "-", "episodes CSV file, - for stdout")
			fs.StringVar(&o.indices, "indices", "", "also write the per-device desaturation summary (ODI 3/4 %, T90, valid hours) to this file, - for stdout")
			fs.DurationVar(&o.odiBaseline, "odi-baseline", alarms.DefaultBaseline, "indices: running-baseline window")
			fs.DurationVar(&o.odiMin, "odi-min-duration", 10*time.Second, "indices: shortest desaturation counted (common practice, from memory)")
			fs.StringVar(&o.participant, "participant", "", "replay only this participant's rows (participant column); --indices per participant-night")
			fs.StringVar(&o.night, "night", participants.DefaultNight, "with --participant: the local-time window of a night, HH:MM-HH:MM")
			fs.StringVar(&o.tz, "tz", "UTC", "with --participant: time zone of --night, an IANA name such as Europe/Berlin")
			if err := parseFlags(fs, args); err != nil {
				return err
			}
			switch {
			case o.profile == "":
				return usagef("--profile is required")
			case o.in == "":
				return usagef("--in is required")
			case o.indices == "-" && o.out == "-":
				return usagef("--indices -: stdout already carries the episodes; give --out FILE")
			case o.odiBaseline < 10*time.Second || o.odiBaseline > 10*time.Minute:
				return usagef("--odi-baseline %v, want in [10s, 10m]", o.odiBaseline)
			case o.odiMin < 0 || o.odiMin > 10*time.Minute:
				return usagef("--odi-min-duration %v, want in [0, 10m]", o.odiMin)
			}
			if o.participant != "" {
				if err := participants.CheckID("--participant", o.participant); err != nil {
					return usagef("%v", err)
				}
			}
			return runReplay(o, s)
		},
	})
}

// loadProfileArg reads a profile file, or a built-in profile when no file
// of that name exists.
func loadProfileArg(arg string) (*alarms.Profile, error) {
	p, err := alarms.LoadProfile(arg)
	if errors.Is(err, fs.ErrNotExist) {
		if b, berr := profiles.Get(arg); berr == nil {
			return b, nil
		}
		return nil, fmt.Errorf("profile %q: no such file and no built-in profile of that name (built-in: %v)", arg, profiles.Names())
	}
	return p, err
}

func runReplay(o replayOptions, s stdio) error {
	p, err := loadProfileArg(o.profile)
	if err != nil {
		return err
	}
	var in io.Reader = s.in
	if o.in != "-" {
		f, err := os.Open(o.in)
		if err != nil {
			return fmt.Errorf("open trend: %w", err)
		}
		defer f.Close()
		in = f
	}
	var win participants.NightWindow
	if o.participant != "" {
		loc, err := time.LoadLocation(o.tz)
		if err != nil {
			return usagef("--tz %q: %v (want an IANA name such as Europe/Berlin)", o.tz, err)
		}
		if win, err = participants.ParseNight(o.night, loc); err != nil {
			return usagef("--%v", err)
		}
		var n int
		if in, n, err = participantRows(in, o.in, o.participant); err != nil {
			return err
		}
		if n == 0 {
			return fmt.Errorf("%s: no row of participant %s", o.in, o.participant)
		}
	}
	trends, err := alarms.ReadTrendCSV(in)
	if err != nil {
		return fmt.Errorf("%s: %w", o.in, err)
	}
	eps, err := alarms.ReplayTrends(p, trends)
	if err != nil {
		return err
	}
	if err := writeTo(o.out, s.out, func(w io.Writer) error {
		return withCaution(w, func() error { return alarms.WriteEpisodesCSV(w, eps) })
	}); err != nil {
		return err
	}
	if o.indices == "" {
		return nil
	}
	iopt := alarms.IndexOptions{Baseline: o.odiBaseline, MinDuration: o.odiMin, Hysteresis: 1}
	if o.participant != "" {
		nrows, err := participantNightIndices(o.participant, trends, win, iopt)
		if err != nil {
			return err
		}
		return writeTo(o.indices, s.out, func(w io.Writer) error {
			return withCaution(w, func() error { return writeNightIndices(w, nrows, win) })
		})
	}
	rows, err := alarms.TrendIndices(trends, iopt)
	if err != nil {
		return err
	}
	return writeTo(o.indices, s.out, func(w io.Writer) error {
		return withCaution(w, func() error { return alarms.WriteIndicesCSV(w, rows) })
	})
}

// withCaution writes the caution comment line, then what write writes
// (docs/contracts.md, "The caution on every output").
func withCaution(w io.Writer, write func() error) error {
	if err := caution.WriteComment(w); err != nil {
		return err
	}
	return write()
}

// writeTo writes to stdout for "-", else creates the file.
func writeTo(path string, stdout io.Writer, write func(io.Writer) error) error {
	if path == "-" {
		return write(stdout)
	}
	f, err := os.Create(path)
	if err != nil {
		return fmt.Errorf("create %s: %w", path, err)
	}
	if err := write(f); err != nil {
		f.Close()
		return fmt.Errorf("%s: %w", path, err)
	}
	if err := f.Close(); err != nil {
		return fmt.Errorf("close %s: %w", path, err)
	}
	return nil
}
