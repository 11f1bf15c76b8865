package calibration

import (
	"bytes"
	"fmt"
	"io"

	"github.com/pulsefleet/pulsefleet/internal/caution"
	"github.com/pulsefleet/pulsefleet/internal/chart"
)

const (
	svgW, svgH                         = 780, 440
	padLeft, padRight, padTop, padBott = 70, 200, 48, 60
)

type point struct{ x, y float64 }

type series struct {
	name   string
	color  string
	points []point
	line   bool   // draw as a polyline instead of dots
	dash   string // stroke-dasharray for lines
}

// figure is a small SVG chart: one plot area with ticked, labelled axes,
// scatter series, lines and a legend, on package chart's palette, ticks and
// escaping. Enough for the calibration curve and the Bland-Altman plot; not
// a plotting library.
type figure struct {
	title, subtitle        string
	xLabel, yLabel         string
	xMin, xMax, yMin, yMax float64
	series                 []series
	notes                  []string // text lines drawn at the top right of the plot area
}

// write renders the figure as a standalone SVG document.
func (c *figure) write(w io.Writer) error {
	xt, x0, x1 := chart.Ticks(c.xMin, c.xMax, 6, chart.Steps125)
	yt, y0, y1 := chart.Ticks(c.yMin, c.yMax, 6, chart.Steps125)
	pw := float64(svgW - padLeft - padRight)
	ph := float64(svgH - padTop - padBott)
	px := func(x float64) float64 { return padLeft + (x-x0)/(x1-x0)*pw }
	py := func(y float64) float64 { return padTop + (y1-y)/(y1-y0)*ph }
	var b bytes.Buffer
	h := svgH + caution.SVGNoteHeight
	fmt.Fprintf(&b, `<svg xmlns="http://www.w3.org/2000/svg" width="%d" height="%d" viewBox="0 0 %d %d" font-family="sans-serif" font-size="12">`+"\n", svgW, h, svgW, h)
	fmt.Fprintf(&b, `<title>%s</title>`+"\n", chart.Escape(c.title))
	fmt.Fprintf(&b, `<rect width="100%%" height="100%%" fill="#fff"/>`+"\n")
	fmt.Fprintf(&b, `<text x="%d" y="20" font-size="15" font-weight="bold">%s</text>`+"\n", padLeft, chart.Escape(c.title))
	if c.subtitle != "" {
		fmt.Fprintf(&b, `<text x="%d" y="38">%s</text>`+"\n", padLeft, chart.Escape(c.subtitle))
	}
	// grid and ticks
	for _, t := range xt {
		x := px(t)
		fmt.Fprintf(&b, `<line x1="%.1f" y1="%d" x2="%.1f" y2="%.1f" stroke="#e4e4e4"/>`, x, padTop, x, padTop+ph)
		fmt.Fprintf(&b, `<text x="%.1f" y="%.1f" text-anchor="middle">%s</text>`+"\n", x, padTop+ph+16, chart.TickLabel(t))
	}
	for _, t := range yt {
		y := py(t)
		fmt.Fprintf(&b, `<line x1="%d" y1="%.1f" x2="%.1f" y2="%.1f" stroke="#e4e4e4"/>`, padLeft, y, padLeft+pw, y)
		fmt.Fprintf(&b, `<text x="%d" y="%.1f" text-anchor="end">%s</text>`+"\n", padLeft-6, y+4, chart.TickLabel(t))
	}
	fmt.Fprintf(&b, `<rect x="%d" y="%d" width="%.1f" height="%.1f" fill="none" stroke="#333"/>`+"\n", padLeft, padTop, pw, ph)
	fmt.Fprintf(&b, `<text x="%.1f" y="%d" text-anchor="middle">%s</text>`+"\n", padLeft+pw/2, svgH-18, chart.Escape(c.xLabel))
	fmt.Fprintf(&b, `<text x="16" y="%.1f" text-anchor="middle" transform="rotate(-90 16 %.1f)">%s</text>`+"\n", padTop+ph/2, padTop+ph/2, chart.Escape(c.yLabel))
	// data, clipped to the plot area
	fmt.Fprintf(&b, `<clipPath id="area"><rect x="%d" y="%d" width="%.1f" height="%.1f"/></clipPath><g clip-path="url(#area)">`+"\n", padLeft, padTop, pw, ph)
	for _, s := range c.series {
		if s.line {
			fmt.Fprintf(&b, `<polyline fill="none" stroke="%s" stroke-width="2"`, s.color)
			if s.dash != "" {
				fmt.Fprintf(&b, ` stroke-dasharray="%s"`, s.dash)
			}
			b.WriteString(` points="`)
			for _, p := range s.points {
				fmt.Fprintf(&b, "%.1f,%.1f ", px(p.x), py(p.y))
			}
			b.WriteString(`"/>` + "\n")
			continue
		}
		fmt.Fprintf(&b, `<g fill="%s" fill-opacity="0.6">`, s.color)
		for _, p := range s.points {
			fmt.Fprintf(&b, `<circle cx="%.1f" cy="%.1f" r="2.5"/>`, px(p.x), py(p.y))
		}
		b.WriteString("</g>\n")
	}
	b.WriteString("</g>\n")
	// legend and notes, right of the plot area
	ly := float64(padTop) + 14
	for _, s := range c.series {
		if s.name == "" {
			continue
		}
		lx := padLeft + pw + 12
		if s.line {
			fmt.Fprintf(&b, `<line x1="%.1f" y1="%.1f" x2="%.1f" y2="%.1f" stroke="%s" stroke-width="2" stroke-dasharray="%s"/>`, lx, ly-4, lx+18, ly-4, s.color, s.dash)
		} else {
			fmt.Fprintf(&b, `<circle cx="%.1f" cy="%.1f" r="3.5" fill="%s"/>`, lx+9, ly-4, s.color)
		}
		fmt.Fprintf(&b, `<text x="%.1f" y="%.1f">%s</text>`+"\n", lx+24, ly, chart.Escape(s.name))
		ly += 16
	}
	for _, n := range c.notes {
		fmt.Fprintf(&b, `<text x="%.1f" y="%.1f">%s</text>`+"\n", padLeft+pw+12, ly, chart.Escape(n))
		ly += 16
	}
	b.WriteString(caution.SVGNote(padLeft, svgH+6) + "\n")
	b.WriteString("</svg>\n")
	_, err := w.Write(b.Bytes())
	return err
}
