package api

import (
	"fmt"
	"math"
	"strconv"
	"strings"
	"time"
)

// A chart is drawn on the server as inline SVG: the page needs no script.
const (
	chartWidth   = 540
	chartHeight  = 180
	chartLeft    = 58
	chartRight   = 14
	chartTop     = 12
	chartBottom  = 26
	chartYTicks  = 4
	chartXLabels = 4
)

type chartPoint struct {
	X, Y  float64
	Label string
}

type chartSeries struct {
	Name  string
	Class string
	// Path joins the points, broken where no data was stored in between.
	Path   string
	Points []chartPoint
}

type chartTick struct {
	Pos   float64
	Label string
	// Anchor aligns an x label to its tick: "end" at the right edge, so
	// that the label stays inside the chart.
	Anchor string
}

// chartTarget is a horizontal line at a value the client named, such as
// the optimum the mean return should approach.
type chartTarget struct {
	Y     float64
	Label string
}

type chartView struct {
	ID, Title, Note string
	Width, Height   int
	PlotLeft        float64
	PlotRight       float64
	PlotTop         float64
	PlotBottom      float64
	Series          []chartSeries
	Targets         []chartTarget
	YTicks, XTicks  []chartTick
	Empty           bool
	// EmptyText says why an empty chart is empty.
	EmptyText string
	Markers   []chartMarker
	Bars      []chartBar
	Legend    []legendKey
}

// seriesData is one line of a chart before it is placed: values at
// positions on the x axis.
type seriesData struct {
	name   string
	xs     []float64
	values []float64
}

func (s *seriesData) add(x, v float64) {
	s.xs = append(s.xs, x)
	s.values = append(s.values, v)
}

// targetLine is a value to draw across a chart, and what it is.
type targetLine struct {
	value float64
	label string
}

// xAxis says where the x axis starts and ends, where its labelled ticks
// go, and how to name a position.
type xAxis struct {
	lo, hi float64
	ticks  []float64
	// label names a tick; point names a point's position in its tooltip.
	label, point func(float64) string
	// gap: consecutive points further apart are not joined.
	gap float64
}

// timeAxis spans [from, to]; positions are Unix seconds.
func timeAxis(from, to time.Time, gap time.Duration) xAxis {
	clock := "15:04"
	if to.Sub(from) <= 10*time.Minute {
		clock = "15:04:05"
	}
	at := func(x float64) time.Time { return time.Unix(0, int64(math.Round(x*1e9))).UTC() }
	a := xAxis{lo: unixSeconds(from), hi: unixSeconds(to), gap: gap.Seconds(),
		label: func(x float64) string { return at(x).Format(clock) },
		point: func(x float64) string { return at(x).Format("15:04:05") }}
	for _, t := range timeTicks(from, to, chartXLabels) {
		a.ticks = append(a.ticks, unixSeconds(t))
	}
	return a
}

func unixSeconds(t time.Time) float64 { return float64(t.UnixNano()) / 1e9 }

// countAxis spans 0 to a round number at or above most; positions are
// counts, named by noun.
func countAxis(most float64, noun string) xAxis {
	ticks := niceTicks(0, math.Max(most, 1), chartXLabels)
	return xAxis{lo: 0, hi: ticks[len(ticks)-1], ticks: ticks, gap: math.Inf(1),
		label: func(x float64) string { return formatCount(int64(math.Round(x))) },
		point: func(x float64) string { return "after " + formatCount(int64(math.Round(x))) + " " + noun }}
}

// newChart lays out series and target lines over the x axis. Values of
// zeroBased charts (counts) keep zero in view; target lines are always in
// view.
func newChart(id, title, note string, axis xAxis, zeroBased bool, targets []targetLine, series ...seriesData) chartView {
	c := chartView{ID: id, Title: title, Note: note, Width: chartWidth, Height: chartHeight,
		PlotLeft: chartLeft, PlotRight: chartWidth - chartRight, PlotTop: chartTop, PlotBottom: chartHeight - chartBottom}
	lo, hi := math.Inf(1), math.Inf(-1)
	for _, s := range series {
		for _, v := range s.values {
			lo, hi = math.Min(lo, v), math.Max(hi, v)
		}
	}
	c.Empty = math.IsInf(lo, 1)
	c.EmptyText = "No training in this window."
	for _, t := range targets {
		lo, hi = math.Min(lo, t.value), math.Max(hi, t.value)
	}
	if math.IsInf(lo, 1) {
		lo, hi = 0, 1
	}
	if zeroBased {
		lo, hi = math.Min(lo, 0), math.Max(hi, 0)
		if lo == hi {
			hi = 1
		}
	}
	ticks := niceTicks(lo, hi, chartYTicks)
	lo, hi = ticks[0], ticks[len(ticks)-1]
	y := func(v float64) float64 { return c.PlotBottom - (v-lo)/(hi-lo)*(c.PlotBottom-c.PlotTop) }
	span := axis.hi - axis.lo
	if span <= 0 {
		span = 1
	}
	x := func(v float64) float64 { return c.PlotLeft + (v-axis.lo)/span*(c.PlotRight-c.PlotLeft) }
	for _, v := range ticks {
		c.YTicks = append(c.YTicks, chartTick{Pos: round2(y(v)), Label: formatNumber(v)})
	}
	for _, v := range axis.ticks {
		tick := chartTick{Pos: round2(x(v)), Label: axis.label(v), Anchor: "middle"}
		if tick.Pos >= c.PlotRight-1 {
			tick.Anchor = "end"
		}
		c.XTicks = append(c.XTicks, tick)
	}
	for _, t := range targets {
		c.Targets = append(c.Targets, chartTarget{Y: round2(y(t.value)), Label: t.label + " " + formatNumber(t.value)})
	}
	for i, s := range series {
		cs := chartSeries{Name: s.name, Class: "s" + strconv.Itoa(i)}
		var path strings.Builder
		for j, at := range s.xs {
			p := chartPoint{X: round2(x(at)), Y: round2(y(s.values[j])),
				Label: fmt.Sprintf("%s %s: %s", axis.point(at), s.name, formatNumber(s.values[j]))}
			if j == 0 || at-s.xs[j-1] > axis.gap {
				fmt.Fprintf(&path, "M%g %g", p.X, p.Y)
			} else {
				fmt.Fprintf(&path, "L%g %g", p.X, p.Y)
			}
			cs.Points = append(cs.Points, p)
		}
		cs.Path = path.String()
		c.Series = append(c.Series, cs)
	}
	return c
}

func round2(v float64) float64 { return math.Round(v*100) / 100 }

// niceTicks returns about n+1 evenly spaced round values (steps of 1, 2 or
// 5 times a power of ten) covering [lo, hi].
func niceTicks(lo, hi float64, n int) []float64 {
	if hi-lo < 1e-12*math.Max(1, math.Abs(hi)) {
		pad := math.Max(math.Abs(hi)*0.1, 1e-9)
		if hi == 0 {
			pad = 1
		}
		lo, hi = lo-pad, hi+pad
	}
	raw := (hi - lo) / float64(n)
	mag := math.Pow(10, math.Floor(math.Log10(raw)))
	step := mag * 10
	for _, m := range []float64{1, 2, 5} {
		if m*mag >= raw {
			step = m * mag
			break
		}
	}
	start := math.Floor(lo/step) * step
	var ticks []float64
	for i := 0; ; i++ {
		// Multiply rather than add, and snap, so that float noise never
		// prints (0.30000000000000004) or leaves hi just out of range.
		v := math.Round((start+float64(i)*step)/step) * step
		ticks = append(ticks, v)
		if v >= hi || i > 4*n {
			return ticks
		}
	}
}

// timeTicks returns up to about n round clock times within [from, to].
func timeTicks(from, to time.Time, n int) []time.Time {
	steps := []time.Duration{time.Second, 2 * time.Second, 5 * time.Second, 10 * time.Second, 15 * time.Second, 30 * time.Second,
		time.Minute, 5 * time.Minute, 15 * time.Minute, 30 * time.Minute,
		time.Hour, 2 * time.Hour, 3 * time.Hour, 6 * time.Hour, 12 * time.Hour, 24 * time.Hour}
	step := steps[len(steps)-1]
	for _, s := range steps {
		if to.Sub(from)/s <= time.Duration(n) {
			step = s
			break
		}
	}
	var out []time.Time
	for t := from.Truncate(step); !t.After(to); t = t.Add(step) {
		if !t.Before(from) {
			out = append(out, t)
		}
	}
	return out
}

// formatNumber prints a figure short and exact enough to read: integers
// whole, other values with four significant digits.
func formatNumber(v float64) string {
	a := math.Abs(v)
	switch {
	case v == math.Trunc(v) && a < 1e12:
		return strconv.FormatFloat(v, 'f', 0, 64)
	case a >= 1e-3 && a < 1e9:
		digits := max(0, 3-int(math.Floor(math.Log10(a))))
		s := strconv.FormatFloat(v, 'f', digits, 64)
		if strings.Contains(s, ".") {
			s = strings.TrimRight(strings.TrimRight(s, "0"), ".")
		}
		return s
	default:
		return strconv.FormatFloat(v, 'e', 3, 64)
	}
}

// chartMarker is an event drawn across a time chart at its time.
type chartMarker struct {
	X     float64
	Kind  string
	Label string
	// Title says what and when in full, as the marker's tooltip.
	Title string
	// LabelY is how far below the top of the plot the label sits, LabelDX
	// how far right of the line (left when negative, Anchor "end").
	LabelY, LabelDX float64
	Anchor          string
}

// Marker labels closer than markerLabelWidth go one line lower.
const (
	markerLabelWidth = 130
	markerLineHeight = 11
)

// chartBar is one stacked share of a bar chart.
type chartBar struct {
	X, Y, W, H float64
	Class      string
	Action     string
	Share      float64
	Title      string
}

type legendKey struct {
	Class, Name string
}

// maxMarkerLabel bounds the characters of a marker's label; its tooltip
// has the rest.
const maxMarkerLabel = 24

// addMarkers draws the events within the axis across the chart.
func (c *chartView) addMarkers(axis xAxis, events []eventMark) {
	for _, e := range events {
		if e.at < axis.lo || e.at > axis.hi {
			continue
		}
		label := e.label
		if r := []rune(label); len(r) > maxMarkerLabel {
			label = string(r[:maxMarkerLabel-1]) + "…"
		}
		m := chartMarker{X: round2(c.xOf(axis, e.at)), Kind: e.kind, Label: label, Title: axis.point(e.at) + " " + e.label, LabelY: 8}
		// Near the right edge, labels end at their line to stay inside.
		m.Anchor, m.LabelDX = "start", 3
		if m.X > c.PlotRight-markerLabelWidth {
			m.Anchor, m.LabelDX = "end", -3
		}
		// Labels of events close together go on lines of their own.
		if n := len(c.Markers); n > 0 && m.X-c.Markers[n-1].X < markerLabelWidth {
			m.LabelY = c.Markers[n-1].LabelY + markerLineHeight
			if m.LabelY > c.PlotBottom-c.PlotTop-markerLineHeight {
				m.LabelY = 8
			}
		}
		c.Markers = append(c.Markers, m)
	}
}

// xOf places a position of the axis on the chart.
func (c *chartView) xOf(axis xAxis, v float64) float64 {
	span := axis.hi - axis.lo
	if span <= 0 {
		span = 1
	}
	return c.PlotLeft + (v-axis.lo)/span*(c.PlotRight-c.PlotLeft)
}

// eventMark is an event at a position of a time axis.
type eventMark struct {
	at          float64
	kind, label string
}

// shareColumn is one bar of a share chart: what share each class had in
// the stretch [from, to).
type shareColumn struct {
	from, to float64
	total    int64
	counts   []int64 // by class, in the order of the chart's classes
}

// newShareChart draws columns of stacked shares, one colour per class
// (named by names), over the axis; with other, the last class is the rest
// of the classes and is drawn grey.
func newShareChart(id, title, note string, axis xAxis, names []string, other bool, columns []shareColumn) chartView {
	c := newChart(id, title, note, axis, true, nil)
	c.EmptyText = "No choices in this window."
	c.Empty = len(columns) == 0
	c.YTicks = nil
	y := func(share float64) float64 { return c.PlotBottom - share*(c.PlotBottom-c.PlotTop) }
	for _, v := range []float64{0, 0.25, 0.5, 0.75, 1} {
		c.YTicks = append(c.YTicks, chartTick{Pos: round2(y(v)), Label: strconv.Itoa(int(v*100)) + "%"})
	}
	classes := make([]string, len(names))
	for i, n := range names {
		classes[i] = "a" + strconv.Itoa(i)
		if other && i == len(names)-1 {
			classes[i] = "other"
		}
		c.Legend = append(c.Legend, legendKey{Class: classes[i], Name: n})
	}
	for _, col := range columns {
		x0 := math.Max(c.xOf(axis, col.from), c.PlotLeft)
		x1 := math.Min(c.xOf(axis, col.to), c.PlotRight)
		if x1 <= x0 || col.total == 0 {
			continue
		}
		below := 0.0
		for i, n := range col.counts {
			if n == 0 {
				continue
			}
			share := float64(n) / float64(col.total)
			top := y(below + share)
			c.Bars = append(c.Bars, chartBar{X: round2(x0), W: round2(x1 - x0), Y: round2(top), H: round2(y(below) - top),
				Class: classes[i], Action: names[i], Share: share,
				Title: fmt.Sprintf("%s %s: %s%% (%s of %s)", axis.point(col.from), names[i], formatNumber(100*share), formatCount(n), formatCount(col.total))})
			below += share
		}
	}
	return c
}

// shareColours is how many classes a share chart tells apart; past it,
// the least frequent are summed as "other".
const shareColours = 8
