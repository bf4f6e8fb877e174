package api

import (
	"fmt"
	"math"
	"math/rand/v2"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/qtally/qtally/internal/views"
	"github.com/qtally/qtally/training"
)

// Axis ticks are round (1, 2 or 5 times a power of ten apart), cover the
// data and stay few, whatever the range.
func TestNiceTicksCoverTheRangeInRoundSteps(t *testing.T) {
	rng := rand.New(rand.NewPCG(7, 8))
	for range 2000 {
		scale := math.Pow(10, float64(rng.IntN(16)-8))
		lo := (rng.Float64() - 0.5) * scale
		hi := lo + rng.Float64()*scale
		ticks := niceTicks(lo, hi, 4)
		if len(ticks) < 2 || len(ticks) > 7 {
			t.Fatalf("[%v, %v]: %d ticks %v", lo, hi, len(ticks), ticks)
		}
		if ticks[0] > lo || ticks[len(ticks)-1] < hi {
			t.Fatalf("[%v, %v]: ticks %v do not cover it", lo, hi, ticks)
		}
		step := ticks[1] - ticks[0]
		mantissa := step / math.Pow(10, math.Floor(math.Log10(step)))
		if !near(mantissa, 1) && !near(mantissa, 2) && !near(mantissa, 5) && !near(mantissa, 10) {
			t.Fatalf("[%v, %v]: step %v is not round", lo, hi, step)
		}
	}
	if got := niceTicks(0, 1, 4); len(got) != 3 || got[0] != 0 || got[1] != 0.5 || got[2] != 1 {
		t.Fatalf("ticks of [0, 1]: %v", got)
	}
	if got := niceTicks(3, 3, 4); got[0] > 3 || got[len(got)-1] < 3 || len(got) < 2 {
		t.Fatalf("ticks of a flat line at 3: %v", got)
	}
}

func near(a, b float64) bool { return math.Abs(a-b) < 1e-6*b }

func TestFiguresPrintShortAndReadable(t *testing.T) {
	for v, want := range map[float64]string{
		0: "0", 12: "12", -3: "-3", 1234567: "1234567", 0.5: "0.5", 13.5812: "13.58",
		-0.18974: "-0.1897", 0.0012345: "0.001234", 2.5e-7: "2.500e-07", 123456.7: "123457",
	} {
		if got := formatNumber(v); got != want {
			t.Errorf("formatNumber(%v) = %q, want %q", v, got, want)
		}
	}
	for n, want := range map[int64]string{0: "0", 999: "999", 1000: "1,000", 1234567: "1,234,567", -45000: "-45,000"} {
		if got := formatCount(n); got != want {
			t.Errorf("formatCount(%d) = %q, want %q", n, got, want)
		}
	}
	for d, want := range map[time.Duration]string{
		0: "0s", 59 * time.Second: "59s", 185 * time.Second: "3m 5s", time.Hour: "1h",
		6*time.Hour + 30*time.Minute: "6h 30m", 48 * time.Hour: "48h", 75 * time.Hour: "3d 3h",
	} {
		if got := formatDuration(d); got != want {
			t.Errorf("formatDuration(%v) = %q, want %q", d, got, want)
		}
	}
}

// Points further apart than the gap are not joined, and every point lies
// in the plot.
func TestChartBreaksLinesAcrossGaps(t *testing.T) {
	from := time.Date(2030, 5, 1, 12, 0, 0, 0, time.UTC)
	to := from.Add(time.Hour)
	var s seriesData
	s.name = "mean return"
	for _, m := range []int{5, 6, 7, 30, 31} {
		s.add(unixSeconds(from.Add(time.Duration(m)*time.Minute)), float64(m))
	}
	c := newChart("return", "Mean return", "", timeAxis(from, to, 3*time.Minute), false, nil, s)
	moves := 0
	for _, ch := range c.Series[0].Path {
		if ch == 'M' {
			moves++
		}
	}
	if moves != 2 || len(c.Series[0].Points) != 5 {
		t.Fatalf("path %q: %d pieces, want 2", c.Series[0].Path, moves)
	}
	for _, p := range c.Series[0].Points {
		if p.X < c.PlotLeft || p.X > c.PlotRight || p.Y < c.PlotTop || p.Y > c.PlotBottom {
			t.Fatalf("point %+v outside the plot", p)
		}
	}
}

// A target line is always in view, labelled with its value, and a
// learning curve's x axis counts episodes from zero to a round number.
func TestChartShowsTargetAndCountsEpisodes(t *testing.T) {
	var s seriesData
	s.name = "mean return"
	for i, v := range []float64{-2, -1, 0.5, 1} {
		s.add(float64(1000*(i+1)), v)
	}
	c := newChart("learning", "Learning curve", "", countAxis(4000, "episodes"), false, []targetLine{{value: 7.95, label: "exact optimum"}}, s)
	if len(c.Targets) != 1 || c.Targets[0].Label != "exact optimum 7.95" {
		t.Fatalf("targets %+v", c.Targets)
	}
	if y := c.Targets[0].Y; y < c.PlotTop || y > c.PlotBottom {
		t.Fatalf("target at y %v outside the plot [%v, %v]", y, c.PlotTop, c.PlotBottom)
	}
	if top := c.YTicks[len(c.YTicks)-1].Label; top != "8" && top != "10" {
		t.Fatalf("the y axis ends at %s, want a round number just above the target", top)
	}
	if first, last := c.XTicks[0], c.XTicks[len(c.XTicks)-1]; first.Label != "0" || last.Label != "4,000" || first.Pos != c.PlotLeft || last.Pos != c.PlotRight {
		t.Fatalf("x ticks %+v, want 0 to 4,000 across the plot", c.XTicks)
	}
	if got := c.Series[0].Points[1].Label; got != "after 2,000 episodes mean return: -1" {
		t.Fatalf("point label %q", got)
	}
	if strings.Count(c.Series[0].Path, "M") != 1 {
		t.Fatalf("a learning curve is one line: %q", c.Series[0].Path)
	}
}

// A policy with more actions than colours draws the seven most chosen on
// their own and the rest as "other"; each column's shares fill it.
func TestActionMixGroupsTheRareActions(t *testing.T) {
	now := time.Date(2026, 3, 1, 12, 0, 0, 0, time.UTC)
	var actions []string
	var buckets []training.ChoiceBucket
	for a := range 10 {
		actions = append(actions, fmt.Sprint("action-", a))
		// Action a is chosen a+1 times in each of two minutes.
		for m := range 2 {
			buckets = append(buckets, training.ChoiceBucket{Start: now.Add(time.Duration(m-2) * time.Minute), Width: time.Minute,
				Action: int16(a), Explore: true, KnownState: a%2 == 0, Count: int64(a + 1)})
		}
	}
	slices.SortStableFunc(buckets, func(a, b training.ChoiceBucket) int { return a.Start.Compare(b.Start) })
	r := views.PolicyReport{Now: now, Window: 10 * time.Minute, ChoiceBuckets: buckets}
	r.Status.Actions = actions
	line := r.Timeline(maxChartPoints)
	mix, rates := choiceCharts(r, line, timeAxis(line.From, line.To, 3*line.Step))
	var legend []string
	for _, k := range mix.Legend {
		legend = append(legend, k.Name)
	}
	// The three least chosen are actions 0, 1 and 2.
	want := "action-3|action-4|action-5|action-6|action-7|action-8|action-9|other 3 actions"
	if strings.Join(legend, "|") != want {
		t.Fatalf("legend %q, want %q", legend, want)
	}
	columns := map[float64]float64{}
	for _, b := range mix.Bars {
		columns[b.X] += b.Share
		if b.Action == "other 3 actions" && !near(b.Share, 6.0/55) {
			t.Fatalf("other's share %v, want (1+2+3)/55", b.Share)
		}
	}
	if len(columns) != 2 {
		t.Fatalf("%d columns, want one per minute: %+v", len(columns), mix.Bars)
	}
	for x, sum := range columns {
		if !near(sum, 1) {
			t.Fatalf("column at %v: shares add up to %v", x, sum)
		}
	}
	// Odd actions met unknown states: 2+4+6+8+10 of each minute's 55 choices.
	for _, s := range rates.Series {
		if s.Name != "unknown state" {
			continue
		}
		if len(s.Points) != 2 {
			t.Fatalf("unknown-state rate has %d points, want one per minute", len(s.Points))
		}
		for _, p := range s.Points {
			if !strings.HasSuffix(p.Label, ": "+formatNumber(100*30.0/55)) {
				t.Fatalf("unknown-state point %q, want %v%%", p.Label, 100*30.0/55)
			}
		}
	}
}
