package tune

import (
	"fmt"
	"math"
	"slices"
	"strconv"
	"strings"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/estimator"
	"github.com/pulsefleet/pulsefleet/internal/caution"
	"github.com/pulsefleet/pulsefleet/internal/chart"
)

// plot is a minimal SVG chart: a frame, linear axes with ticks, and marks.
type plot struct {
	w, h                  float64
	left, right, top, bot float64
	x0, x1, y0, y1        float64
	b                     strings.Builder
	title, xlabel, ylabel string
	xticks, yticks        []float64
	xfmt, yfmt            func(float64) string
}

func newPlot(title, xlabel, ylabel string, x0, x1, y0, y1 float64) *plot {
	p := &plot{w: 900, h: 430, left: 70, right: 20, top: 40, bot: 55,
		title: title, xlabel: xlabel, ylabel: ylabel}
	p.xticks, p.x0, p.x1 = chart.Ticks(x0, x1, 5, chart.Steps1225)
	p.yticks, p.y0, p.y1 = chart.Ticks(y0, y1, 5, chart.Steps1225)
	p.xfmt, p.yfmt = chart.TickLabel, chart.TickLabel
	return p
}

func (p *plot) X(x float64) float64 {
	return p.left + (x-p.x0)/(p.x1-p.x0)*(p.w-p.left-p.right)
}

func (p *plot) Y(y float64) float64 {
	return p.h - p.bot - (y-p.y0)/(p.y1-p.y0)*(p.h-p.top-p.bot)
}

func (p *plot) frame() {
	fmt.Fprintf(&p.b, `<rect x="0" y="0" width="%g" height="%g" fill="#ffffff"/>`, p.w, p.h)
	fmt.Fprintf(&p.b, `<text x="%g" y="22" font-size="15" font-weight="bold">%s</text>`, p.left, chart.Escape(p.title))
	for _, t := range p.yticks {
		y := p.Y(t)
		fmt.Fprintf(&p.b, `<line x1="%g" y1="%.1f" x2="%g" y2="%.1f" stroke="#e4e4e4"/>`, p.left, y, p.w-p.right, y)
		fmt.Fprintf(&p.b, `<text x="%g" y="%.1f" font-size="12" text-anchor="end">%s</text>`, p.left-6, y+4, p.yfmt(t))
	}
	for _, t := range p.xticks {
		x := p.X(t)
		fmt.Fprintf(&p.b, `<line x1="%.1f" y1="%g" x2="%.1f" y2="%g" stroke="#e4e4e4"/>`, x, p.top, x, p.h-p.bot)
		fmt.Fprintf(&p.b, `<text x="%.1f" y="%g" font-size="12" text-anchor="middle">%s</text>`, x, p.h-p.bot+17, p.xfmt(t))
	}
	fmt.Fprintf(&p.b, `<rect x="%g" y="%g" width="%g" height="%g" fill="none" stroke="#555555"/>`,
		p.left, p.top, p.w-p.left-p.right, p.h-p.top-p.bot)
	fmt.Fprintf(&p.b, `<text x="%g" y="%g" font-size="13" text-anchor="middle">%s</text>`,
		(p.left+p.w-p.right)/2, p.h-12, chart.Escape(p.xlabel))
	fmt.Fprintf(&p.b, `<text transform="translate(16,%g) rotate(-90)" font-size="13" text-anchor="middle">%s</text>`,
		(p.top+p.h-p.bot)/2, chart.Escape(p.ylabel))
}

func (p *plot) svg() string {
	h := p.h + caution.SVGNoteHeight // the caution below the chart, so a saved chart carries it
	return fmt.Sprintf(`<svg xmlns="http://www.w3.org/2000/svg" width="%g" height="%g" viewBox="0 0 %g %g" font-family="DejaVu Sans, Arial, sans-serif">%s%s</svg>`,
		p.w, h, p.w, h, p.b.String(), caution.SVGNote(p.left, p.h+6))
}

// FrontierSVG draws alarm burden (episodes per device-day) against
// sensitivity for every grid point; Pareto-optimal points are filled,
// joined and labelled.
func FrontierSVG(res *Result) string {
	xlo, xhi, ylo, anySens := math.Inf(1), math.Inf(-1), 100.0, false
	for _, r := range res.Rows {
		if finite(r.PerDeviceDay) {
			xlo, xhi = min(xlo, r.PerDeviceDay), max(xhi, r.PerDeviceDay)
		}
		if finite(r.Sensitivity) {
			anySens = true
			ylo = min(ylo, 100*r.Sensitivity)
		}
	}
	if !anySens {
		ylo = 0
	}
	if math.IsInf(xlo, 1) {
		xlo, xhi = 0, 1
	}
	// Zoom to the data: the axes need not start at zero.
	pad := max((xhi-xlo)*0.06, xhi*0.01, 0.01)
	p := newPlot("Alarm burden against sensitivity", "alarms per device-day (all conditions)",
		"sensitivity (% of reference events)", max(0, xlo-pad), xhi+pad, max(0, ylo-5), 100)
	p.frame()
	if !anySens {
		fmt.Fprintf(&p.b, `<text x="%g" y="%g" font-size="13" fill="#aa0000">no reference events in the data: sensitivity undefined</text>`, p.left+10, p.top+20)
	}
	sens := func(r Row) float64 {
		if finite(r.Sensitivity) {
			return 100 * r.Sensitivity
		}
		return 0
	}
	var front []int
	for i, r := range res.Rows {
		if !finite(r.PerDeviceDay) {
			continue
		}
		if r.Pareto {
			front = append(front, i)
			continue
		}
		fmt.Fprintf(&p.b, `<circle cx="%.1f" cy="%.1f" r="3.5" fill="none" stroke="#888888"><title>%s</title></circle>`,
			p.X(r.PerDeviceDay), p.Y(sens(r)), chart.Escape(pointTitle(res, i)))
	}
	slices.SortFunc(front, func(a, b int) int {
		ra, rb := res.Rows[a], res.Rows[b]
		switch {
		case ra.PerDeviceDay != rb.PerDeviceDay:
			return cmpF(ra.PerDeviceDay, rb.PerDeviceDay)
		default:
			return cmpF(sens(ra), sens(rb))
		}
	})
	var path strings.Builder
	for k, i := range front {
		r := res.Rows[i]
		cmd := "L"
		if k == 0 {
			cmd = "M"
		}
		fmt.Fprintf(&path, "%s%.1f,%.1f ", cmd, p.X(r.PerDeviceDay), p.Y(sens(r)))
	}
	if len(front) > 1 {
		fmt.Fprintf(&p.b, `<path d="%s" fill="none" stroke="%s" stroke-width="1.5"/>`, path.String(), chart.Blue)
	}
	for k, i := range front {
		r := res.Rows[i]
		x, y := p.X(r.PerDeviceDay), p.Y(sens(r))
		fmt.Fprintf(&p.b, `<circle cx="%.1f" cy="%.1f" r="5" fill="%s"><title>%s</title></circle>`, x, y, chart.Blue, chart.Escape(pointTitle(res, i)))
		if len(front) <= 12 || k%((len(front)+11)/12) == 0 {
			fmt.Fprintf(&p.b, `<text x="%.1f" y="%.1f" font-size="11" fill="#333333">%s</text>`, x+7, y+13, chart.Escape(shortName(res.Points[i].Name)))
		}
	}
	// Legend.
	lx, ly := p.w-p.right-200, p.h-p.bot-42
	fmt.Fprintf(&p.b, `<rect x="%g" y="%g" width="192" height="36" fill="#ffffff" stroke="#cccccc"/>`, lx, ly)
	fmt.Fprintf(&p.b, `<circle cx="%g" cy="%g" r="5" fill="%s"/><text x="%g" y="%g" font-size="12">Pareto-optimal profile</text>`, lx+12, ly+12, chart.Blue, lx+24, ly+16)
	fmt.Fprintf(&p.b, `<circle cx="%g" cy="%g" r="3.5" fill="none" stroke="#888888"/><text x="%g" y="%g" font-size="12">other grid point</text>`, lx+12, ly+27, lx+24, ly+31)
	return p.svg()
}

func cmpF(a, b float64) int {
	switch {
	case a < b:
		return -1
	case a > b:
		return 1
	}
	return 0
}

// shortName is the grid-point part of a profile name (g07).
func shortName(name string) string {
	if i := strings.LastIndex(name, "-g"); i >= 0 {
		return name[i+1:]
	}
	return name
}

func pointTitle(res *Result, i int) string {
	r := res.Rows[i]
	return fmt.Sprintf("%s: %s; %.2f alarms/device-day, sensitivity %s %%", res.Points[i].Name,
		describe(res.Grid.Sweep, res.Points[i].Values), r.PerDeviceDay, num(100*r.Sensitivity, 1))
}

// limitChart describes the "alarms per day against limit, one line per
// delay" figure: which condition, which other keys are held, and the lines.
type limitChart struct {
	cond          string
	held          []string // "KEY=VALUE" of other swept keys held fixed
	svg           string
	missingReason string
}

// LimitSVG draws alarms per device-day against the limit of the first
// condition whose limit is swept, one line per swept delay of that
// condition. Other swept keys are held at the base profile's value when it
// is among theirs, else at their first value. It returns "" and the reason
// when the grid sweeps no limit.
func LimitSVG(res *Result) (svg, caption string) {
	lc := buildLimitChart(res)
	if lc.svg == "" {
		return "", lc.missingReason
	}
	caption = "Condition " + lc.cond + "."
	if len(lc.held) > 0 {
		caption += " Other swept keys held at " + strings.Join(lc.held, ", ") + "."
	}
	return lc.svg, caption
}

func buildLimitChart(res *Result) limitChart {
	g := res.Grid
	li, di := -1, -1
	var cond string
	for k, s := range g.Sweep {
		c, key, _ := strings.Cut(s.Key, ".")
		if key == "limit" {
			li, cond = k, c
			break
		}
	}
	if li < 0 {
		return limitChart{missingReason: "The grid sweeps no limit, so there is no chart of alarms against the limit."}
	}
	for k, s := range g.Sweep {
		if s.Key == cond+".delay" {
			di = k
		}
	}
	held := make([]string, len(g.Sweep))
	var heldDesc []string
	for k, s := range g.Sweep {
		if k == li || k == di {
			continue
		}
		held[k] = baseValue(g, s)
		heldDesc = append(heldDesc, s.Key+"="+held[k])
	}
	limits := g.Sweep[li].Values
	delays := []string{""}
	if di >= 0 {
		delays = g.Sweep[di].Values
	}
	lim := make([]float64, len(limits))
	for i, v := range limits {
		lim[i], _ = strconv.ParseFloat(v, 64)
	}
	y, ymin, ymax := limitLines(res, held, li, di, limits, delays)
	xlo, xhi := slices.Min(lim), slices.Max(lim)
	if xhi == xlo {
		xlo, xhi = xlo-1, xhi+1
	}
	unit := limitUnit(g, cond)
	ypad := max((ymax-ymin)*0.08, ymax*0.01, 0.01)
	p := newPlot("Alarms per device-day against "+cond+" limit", cond+" limit"+unit,
		"alarms per device-day (all conditions)", xlo, xhi, max(0, ymin-ypad), ymax+ypad)
	p.frame()
	order := make([]int, len(limits))
	for i := range order {
		order[i] = i
	}
	slices.SortFunc(order, func(a, b int) int { return cmpF(lim[a], lim[b]) })
	for d, dv := range delays {
		drawLimitLine(p, d, dv, order, lim, y[d])
	}
	return limitChart{cond: cond, held: heldDesc, svg: p.svg()}
}

// limitUnit is the unit, in brackets, of the limit of condition cond.
func limitUnit(g *Grid, cond string) string {
	if c := g.Base.Condition(cond); c != nil {
		switch c.Kind {
		case alarms.SpO2Low, alarms.SpO2High:
			return " (%)"
		case alarms.PulseLow, alarms.PulseHigh:
			return " (/min)"
		case alarms.Desaturation:
			return " (points below baseline)"
		}
	}
	return ""
}

// drawLimitLine draws the line of delay value dv (the d-th; "" when the
// grid sweeps no delay) through the points ys over the limits lim, taken in
// the order order, with its legend entry.
func drawLimitLine(p *plot, d int, dv string, order []int, lim, ys []float64) {
	col := chart.Color(d)
	var path strings.Builder
	first := true
	for _, l := range order {
		if !finite(ys[l]) {
			continue
		}
		cmd := "L"
		if first {
			cmd, first = "M", false
		}
		fmt.Fprintf(&path, "%s%.1f,%.1f ", cmd, p.X(lim[l]), p.Y(ys[l]))
		fmt.Fprintf(&p.b, `<circle cx="%.1f" cy="%.1f" r="3.5" fill="%s"/>`, p.X(lim[l]), p.Y(ys[l]), col)
	}
	fmt.Fprintf(&p.b, `<path d="%s" fill="none" stroke="%s" stroke-width="2"/>`, path.String(), col)
	label := "as swept"
	if dv != "" {
		label = "delay " + dv
	}
	lx, ly := p.left+12, p.top+16+float64(d)*17
	fmt.Fprintf(&p.b, `<line x1="%g" y1="%g" x2="%g" y2="%g" stroke="%s" stroke-width="2"/><text x="%g" y="%g" font-size="12">%s</text>`,
		lx, ly-4, lx+20, ly-4, col, lx+26, ly, chart.Escape(label))
}

// limitLines is alarms per device-day by [delay][limit] (NaN where no grid
// point has that pair with the other keys held), and its finite range.
func limitLines(res *Result, held []string, li, di int, limits, delays []string) (y [][]float64, ymin, ymax float64) {
	g := res.Grid
	y = make([][]float64, len(delays))
	ymax, ymin = 0.0, math.Inf(1)
	for d := range delays {
		y[d] = make([]float64, len(limits))
		for l := range limits {
			y[d][l] = math.NaN()
		}
	}
	for i, pt := range res.Points {
		ok := true
		for k := range g.Sweep {
			if held[k] != "" && pt.Values[k] != held[k] {
				ok = false
			}
		}
		if !ok {
			continue
		}
		l := slices.Index(limits, pt.Values[li])
		d := 0
		if di >= 0 {
			d = slices.Index(delays, pt.Values[di])
		}
		y[d][l] = res.Rows[i].PerDeviceDay
		if finite(y[d][l]) {
			ymax, ymin = max(ymax, y[d][l]), min(ymin, y[d][l])
		}
	}
	if math.IsInf(ymin, 1) {
		ymin = 0
	}
	return y, ymin, ymax
}

// baseValue is the value of s the base profile has, when it is among the
// swept values; else the first swept value. For the averaging times, the
// "base" is the estimator's default, which the gateway runs.
func baseValue(g *Grid, s Sweep) string {
	if s.Key == AveragingKey {
		if i := slices.Index(g.AveragingS, estimator.DefaultAveragingS); i >= 0 {
			return s.Values[i]
		}
		return s.Values[0]
	}
	for _, v := range s.Values {
		p := g.Base.Clone()
		if err := p.Set(s.Key, v); err != nil {
			continue
		}
		a, _ := p.Marshal()
		b, _ := g.Base.Marshal()
		if string(a) == string(b) {
			return v
		}
	}
	return s.Values[0]
}
