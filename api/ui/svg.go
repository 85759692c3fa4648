package ui

// The timeline plot: server-rendered SVG, three panels on one time axis.
// Styling is by class only (the page's one stylesheet), so the strict
// Content-Security-Policy needs no inline style attributes; every marker
// is a link to its explanation and carries a <title> for its reading.

import (
	"fmt"
	"html/template"
	"math"
	"strings"
	"time"

	"github.com/deadspace-fhir/deadspace/derive"
)

const (
	plotWidth   = 960
	plotLeft    = 72
	plotRight   = 16
	panelGap    = 30
	axisHeight  = 34
	panelTop    = 22
	etco2GapCut = 10 * time.Minute // a longer gap breaks the EtCO2 line
)

type panel struct {
	title  string
	unit   string
	height float64
	lo, hi float64
	top    float64
}

func (p panel) y(v float64) float64 {
	if p.hi == p.lo {
		return p.top + p.height/2
	}
	return p.top + p.height - (v-p.lo)/(p.hi-p.lo)*p.height
}

type axis struct{ from, to time.Time }

func (a axis) x(t time.Time) float64 {
	w := float64(plotWidth - plotLeft - plotRight)
	total := a.to.Sub(a.from)
	if total <= 0 {
		return plotLeft + w/2
	}
	return plotLeft + float64(t.Sub(a.from))/float64(total)*w
}

// Plot renders a timeline's SVG. links makes the hrefs.
func Plot(t *Timeline, links Links) template.HTML {
	if t.From.IsZero() {
		return template.HTML(`<p class="empty">Nothing to plot.</p>`)
	}
	ax := axis{t.From.Add(-10 * time.Minute), t.To.Add(10 * time.Minute)}
	var co2, grad, frac []float64
	for _, p := range t.EtCO2 {
		co2 = append(co2, p.Value)
	}
	for _, p := range t.PaCO2 {
		co2 = append(co2, p.Shown())
	}
	for _, v := range t.Values {
		switch v.Code {
		case derive.CodeGradient:
			grad = append(grad, v.Value)
		case derive.CodePhysiologic, derive.CodeEstimatedFraction:
			frac = append(frac, v.Value)
		}
	}
	panels := []panel{
		{title: "PaCO2 and EtCO2", unit: "mm[Hg]", height: 200},
		{title: "PaCO2 − EtCO2", unit: "mm[Hg]", height: 110},
		{title: "VD/VT", unit: "fraction", height: 130},
	}
	panels[0].lo, panels[0].hi = bounds(co2, 0, 10)
	panels[1].lo, panels[1].hi = bounds(grad, 0, 5)
	panels[2].lo, panels[2].hi = bounds(frac, 0, 0.2)
	if panels[2].hi > 1 {
		panels[2].hi = 1
	}
	top := float64(panelTop)
	for i := range panels {
		panels[i].top = top
		top += panels[i].height + panelGap
	}
	height := top - panelGap + axisHeight

	var b strings.Builder
	fmt.Fprintf(&b, `<svg class="plot" viewBox="0 0 %d %.0f" width="%d" height="%.0f" role="img" aria-labelledby="plot-title plot-desc" xmlns="http://www.w3.org/2000/svg">`, plotWidth, height, plotWidth, height)
	fmt.Fprintf(&b, `<title id="plot-title">Dead-space timeline of patient %s</title>`, esc(t.ID))
	fmt.Fprintf(&b, `<desc id="plot-desc">From %s to %s: end-tidal CO2 as a line and each arterial PaCO2 as a point; the PaCO2 − EtCO2 gradient; VD/VT measured (filled) and estimated (open). Shaded bands are end-tidal CO2 falls (plain) and rises (hatched). The table below lists the same values.</desc>`,
		t.From.Format(time.RFC3339), t.To.Format(time.RFC3339))

	// Fall episodes first, so the data draws over them.
	for _, f := range t.Findings {
		x0, x1 := ax.x(f.Onset), ax.x(f.End)
		if x1-x0 < 6 {
			x1 = x0 + 6
		}
		class, what := "fall", "fall"
		if f.Rise {
			class, what = "rise", "rise"
		}
		fmt.Fprintf(&b, `<a href="%s"><rect class="%s" x="%.1f" y="%d" width="%.1f" height="%.1f"><title>EtCO2 %s %+.1f mm[Hg] from %s to %s</title></rect></a>`,
			esc(links.Explain(f.ExplainID)), class, x0, panelTop, x1-x0, top-panelGap-panelTop, what, f.Change, f.Onset.Format("15:04"), f.End.Format("15:04"))
	}
	for _, p := range panels {
		drawFrame(&b, p)
	}
	drawTimeAxis(&b, ax, panels[0].top, top-panelGap)

	// Panel 1: the EtCO2 line, broken at gaps, then the PaCO2 points.
	var line []string
	var last time.Time
	flush := func() {
		if len(line) > 1 {
			fmt.Fprintf(&b, `<polyline class="etco2" points="%s"/>`, strings.Join(line, " "))
		}
		line = line[:0]
	}
	for _, pt := range t.EtCO2 {
		if pt.Status != StatusFinal {
			continue
		}
		if !last.IsZero() && pt.At.Sub(last) > etco2GapCut {
			flush()
		}
		line = append(line, fmt.Sprintf("%.1f,%.1f", ax.x(pt.At), panels[0].y(pt.Value)))
		last = pt.At
	}
	flush()
	for _, pt := range t.PaCO2 {
		x, y := ax.x(pt.At), panels[0].y(pt.Shown())
		title := fmt.Sprintf("PaCO2 %.1f mm[Hg] at %s", pt.Value, pt.At.Format("15:04"))
		if pt.Adjusted != 0 {
			title = fmt.Sprintf("PaCO2 %.1f mm[Hg] at the patient's temperature (%.1f reported at 37 °C) at %s", pt.Adjusted, pt.Value, pt.At.Format("15:04"))
		}
		if pt.Status != StatusFinal {
			title += " (" + pt.Status + ": " + pt.Why + ")"
		}
		open := ""
		if pt.ExplainID != "" {
			open = fmt.Sprintf(`<a href="%s">`, esc(links.Explain(pt.ExplainID)))
		}
		b.WriteString(open)
		marker(&b, "paco2", pt.Status, "circle", x, y, title)
		if open != "" {
			b.WriteString(`</a>`)
		}
	}

	// Panels 2 and 3: the derived values.
	series := []struct {
		code  derive.Code
		p     panel
		class string
		shape string
	}{
		{derive.CodeGradient, panels[1], "gradient", "circle"},
		{derive.CodePhysiologic, panels[2], "measured", "circle"},
		{derive.CodeEstimatedFraction, panels[2], "estimated", "square"},
	}
	for _, s := range series {
		var pts []string
		for _, v := range t.Values {
			if v.Code == s.code && (v.Status == StatusFinal || v.Status == StatusAmended) {
				pts = append(pts, fmt.Sprintf("%.1f,%.1f", ax.x(v.At), s.p.y(v.Value)))
			}
		}
		if len(pts) > 1 {
			fmt.Fprintf(&b, `<polyline class="join %s" points="%s"/>`, s.class, strings.Join(pts, " "))
		}
		for _, v := range t.Values {
			if v.Code != s.code {
				continue
			}
			title := fmt.Sprintf("%s %s at %s", v.Label, FormatValue(v), v.At.Format("15:04"))
			if v.Status == StatusSuperseded || v.Status == StatusWithdrawn {
				title += " (" + v.Status + ")"
			}
			fmt.Fprintf(&b, `<a href="%s">`, esc(links.Explain(v.ExplainID)))
			marker(&b, s.class, v.Status, s.shape, ax.x(v.At), s.p.y(v.Value), title)
			b.WriteString(`</a>`)
		}
	}
	b.WriteString(`</svg>`)
	return template.HTML(b.String())
}

// marker draws one point: filled for a current value, open for an
// estimate, grey with a strike for a superseded value, a cross for a
// withdrawn one.
func marker(b *strings.Builder, class, status, shape string, x, y float64, title string) {
	cls := class + " " + status
	t := "<title>" + esc(title) + "</title>"
	switch {
	case status == StatusWithdrawn:
		fmt.Fprintf(b, `<g class="%s"><path class="cross" d="M%.1f %.1fl10 10m0 -10l-10 10"/><rect class="hit" x="%.1f" y="%.1f" width="14" height="14"/>%s</g>`, cls, x-5, y-5, x-7, y-7, t)
	case shape == "square":
		fmt.Fprintf(b, `<rect class="%s" x="%.1f" y="%.1f" width="9" height="9">%s</rect>`, cls, x-4.5, y-4.5, t)
	default:
		fmt.Fprintf(b, `<circle class="%s" cx="%.1f" cy="%.1f" r="5">%s</circle>`, cls, x, y, t)
	}
	if status == StatusSuperseded {
		fmt.Fprintf(b, `<path class="strike" d="M%.1f %.1fl14 -14"/>`, x-7, y+7)
	}
}

func drawFrame(b *strings.Builder, p panel) {
	x1 := float64(plotWidth - plotRight)
	fmt.Fprintf(b, `<rect class="frame" x="%d" y="%.1f" width="%.1f" height="%.1f"/>`, plotLeft, p.top, x1-plotLeft, p.height)
	for _, v := range ticks(p.lo, p.hi, 4) {
		y := p.y(v)
		fmt.Fprintf(b, `<line class="grid" x1="%d" x2="%.1f" y1="%.1f" y2="%.1f"/>`, plotLeft, x1, y, y)
		fmt.Fprintf(b, `<text class="tick" x="%d" y="%.1f" text-anchor="end">%s</text>`, plotLeft-6, y+4, esc(tickLabel(v)))
	}
	fmt.Fprintf(b, `<text class="panel-title" x="%d" y="%.1f">%s (%s)</text>`, plotLeft, p.top-6, esc(p.title), esc(p.unit))
}

func drawTimeAxis(b *strings.Builder, ax axis, y0, y1 float64) {
	span := ax.to.Sub(ax.from)
	step := time.Hour
	switch {
	case span > 48*time.Hour:
		step = 12 * time.Hour
	case span > 24*time.Hour:
		step = 6 * time.Hour
	case span > 12*time.Hour:
		step = 2 * time.Hour
	case span < 3*time.Hour:
		step = 30 * time.Minute
	}
	start := ax.from.Truncate(step)
	if start.Before(ax.from) {
		start = start.Add(step)
	}
	for t := start; !t.After(ax.to); t = t.Add(step) {
		x := ax.x(t)
		fmt.Fprintf(b, `<line class="vgrid" x1="%.1f" x2="%.1f" y1="%.1f" y2="%.1f"/>`, x, x, y0, y1)
		label := t.Format("15:04")
		if t.Hour() == 0 && t.Minute() == 0 {
			label = t.Format("Jan 2")
		}
		fmt.Fprintf(b, `<text class="tick" x="%.1f" y="%.1f" text-anchor="middle">%s</text>`, x, y1+16, esc(label))
	}
	fmt.Fprintf(b, `<text class="tick" x="%d" y="%.1f" text-anchor="end">UTC</text>`, plotWidth-plotRight, y1+30)
}

// bounds pads the data's range to whole ticks, with a floor on its width
// so a flat series is not magnified into noise.
func bounds(vs []float64, lo, minWidth float64) (float64, float64) {
	if len(vs) == 0 {
		return lo, lo + minWidth
	}
	mn, mx := vs[0], vs[0]
	for _, v := range vs {
		mn, mx = math.Min(mn, v), math.Max(mx, v)
	}
	if mx-mn < minWidth {
		mid := (mx + mn) / 2
		mn, mx = mid-minWidth/2, mid+minWidth/2
	}
	// A margin, so no point sits on the frame.
	pad := (mx - mn) * 0.06
	mn, mx = mn-pad, mx+pad
	step := niceStep((mx - mn) / 4)
	mn = math.Floor(mn/step) * step
	mx = math.Ceil(mx/step) * step
	if mn < lo && lo == 0 && vs[0] >= 0 {
		mn = 0
	}
	return mn, mx
}

func niceStep(raw float64) float64 {
	if raw <= 0 {
		return 1
	}
	mag := math.Pow(10, math.Floor(math.Log10(raw)))
	for _, m := range []float64{1, 2, 2.5, 5, 10} {
		if raw <= m*mag {
			return m * mag
		}
	}
	return 10 * mag
}

func ticks(lo, hi float64, n int) []float64 {
	step := niceStep((hi - lo) / float64(n))
	var out []float64
	for v := math.Ceil(lo/step) * step; v <= hi+step/1e6; v += step {
		out = append(out, math.Round(v/step)*step)
	}
	return out
}

func tickLabel(v float64) string {
	if v == math.Trunc(v) {
		return fmt.Sprintf("%.0f", v)
	}
	return strings.TrimRight(strings.TrimRight(fmt.Sprintf("%.2f", v), "0"), ".")
}

func esc(s string) string { return template.HTMLEscapeString(s) }

// FormatValue prints a value with its digits and unit.
func FormatValue(v Value) string {
	s := fmt.Sprintf("%.*f", v.Digits, v.Value)
	if u := UnitText(v.Unit); u != "" {
		s += " " + u
	}
	return s
}

// UnitText is how a UCUM code is shown: fractions carry none.
func UnitText(ucum string) string {
	if ucum == "1" {
		return ""
	}
	return ucum
}
