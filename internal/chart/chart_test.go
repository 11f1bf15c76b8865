package chart

import (
	"math"
	"slices"
	"testing"
)

// Check values are worked by hand: about n intervals of 1, 2 (2.5) or 5
// times a power of ten covering the range (common practice for axes).
func TestTicks(t *testing.T) {
	for _, c := range []struct {
		lo, hi   float64
		n        int
		steps    []float64
		want     []float64
		nlo, nhi float64
	}{
		{0.42, 0.98, 6, Steps125, []float64{0.4, 0.5, 0.6, 0.7, 0.8, 0.9, 1}, 0.4, 1},
		{72, 100, 6, Steps125, []float64{70, 75, 80, 85, 90, 95, 100}, 70, 100},
		{0, 11, 5, Steps1225, []float64{0, 2.5, 5, 7.5, 10, 12.5}, 0, 12.5},
		{0, 11, 5, Steps125, []float64{0, 5, 10, 15}, 0, 15},
		{3, 3, 4, Steps125, []float64{2, 2.5, 3, 3.5, 4}, 2, 4},
		{0, 90, 5, Steps125, []float64{0, 20, 40, 60, 80, 100}, 0, 100},
	} {
		got, nlo, nhi := Ticks(c.lo, c.hi, c.n, c.steps)
		if !slices.EqualFunc(got, c.want, near) || !near(nlo, c.nlo) || !near(nhi, c.nhi) {
			t.Errorf("Ticks(%v, %v, %d, %v) = %v [%v, %v], want %v [%v, %v]", c.lo, c.hi, c.n, c.steps, got, nlo, nhi, c.want, c.nlo, c.nhi)
		}
	}
}

func TestTickLabelAndEscape(t *testing.T) {
	for v, want := range map[float64]string{0.30000000000000004: "0.3", 1e6: "1e+06", 12.5: "12.5"} {
		if got := TickLabel(v); got != want {
			t.Errorf("TickLabel(%v) = %q, want %q", v, got, want)
		}
	}
	if got := TickLabel(negZero()); got != "0" {
		t.Errorf("TickLabel(-0) = %q, want 0", got)
	}
	if got, want := Escape(`R < 0.5 & "a"`), "R &lt; 0.5 &amp; &#34;a&#34;"; got != want {
		t.Errorf("Escape = %q, want %q", got, want)
	}
}

// near allows the last-digit error of k*step in floating point.
func near(a, b float64) bool { return math.Abs(a-b) <= 1e-9*max(1, math.Abs(b)) }

func negZero() float64 { z := 0.0; return -z }

func TestPaletteWraps(t *testing.T) {
	if Color(0) != Blue || Color(len(Palette)) != Blue || Color(1) != Orange {
		t.Errorf("Color does not follow Palette: %s %s %s", Color(0), Color(len(Palette)), Color(1))
	}
}
