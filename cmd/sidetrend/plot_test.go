package main

import (
	"context"
	"image/png"
	"math"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"gonum.org/v1/gonum/floats/scalar"
	"gonum.org/v1/plot"

	"github.com/sidetrend/sidetrend/calendar"
	"github.com/sidetrend/sidetrend/pgsync"
)

func TestPlotWritesPNG(t *testing.T) {
	url, _ := salesDB(t)
	out := filepath.Join(t.TempDir(), "north.png")
	if msg, err := runCLI(t, context.Background(), "plot", "--db", url, "--tracker", "sales", "--series", "north",
		"--out", out, "--width", "800", "--height", "400"); err != nil {
		t.Fatalf("plot: %v\n%s", err, msg)
	}
	f, err := os.Open(out)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	img, err := png.Decode(f)
	if err != nil {
		t.Fatalf("%s is not a PNG: %v", out, err)
	}
	// The sizes asked for with --width and --height.
	if b := img.Bounds(); b.Dx() != 800 || b.Dy() != 400 {
		t.Errorf("PNG is %dx%d, want 800x400", b.Dx(), b.Dy())
	}
}

// TestChartMatchesViews checks that the chart's forecast and slope, taken
// from the stored state, are what the forecasts and slopes views serve,
// and that the history shows every bucket after --from.
func TestChartMatchesViews(t *testing.T) {
	_, pool := salesDB(t)
	ctx := context.Background()
	d, err := pgsync.LoadSeries(ctx, pool, "sales", "north")
	if err != nil {
		t.Fatal(err)
	}
	from := salesFirstDay.AddDate(0, 0, 20)
	cd, err := buildChart(d, from)
	if err != nil {
		t.Fatal(err)
	}
	// Days 20 to salesDays-1 all have a bucket (day 30 an empty one, 0).
	if len(cd.ObsT) != salesDays-20 || !cd.ObsT[0].Equal(from) {
		t.Fatalf("history has %d buckets from %v, want %d from %v", len(cd.ObsT), cd.ObsT[0], salesDays-20, from)
	}
	if cd.ObsY[10] != 0 {
		t.Errorf("day 30 (no rows, empty buckets are zero for sums) shows %v, want 0", cd.ObsY[10])
	}
	// Every bucket after the warm-up is scored, so each has a fitted value.
	if len(cd.FitT) != len(cd.ObsT) {
		t.Errorf("%d fitted values for %d buckets", len(cd.FitT), len(cd.ObsT))
	}

	rows, err := pool.Query(ctx, `SELECT period_start, forecast, lower80, upper80, lower95, upper95 FROM sidetrend.forecasts
		WHERE tracker = 'sales' AND series_key = 'north' ORDER BY horizon`)
	if err != nil {
		t.Fatal(err)
	}
	var n int
	// The chart and the view come from the same stored state: equal to
	// rounding (the view's float8 arrays hold the same doubles).
	const tol = 1e-12
	for rows.Next() {
		var at time.Time
		var y, lower80, upper80, lower95, upper95 float64
		if err := rows.Scan(&at, &y, &lower80, &upper80, &lower95, &upper95); err != nil {
			t.Fatal(err)
		}
		if n >= len(cd.FcT) {
			t.Fatalf("the view has more than the chart's %d forecasts", len(cd.FcT))
		}
		if !cd.FcT[n].Equal(at) {
			t.Errorf("horizon %d: chart at %v, view at %v", n+1, cd.FcT[n], at)
		}
		for _, c := range []struct {
			name      string
			got, want float64
		}{{"forecast", cd.Forecast[n], y}, {"lower80", cd.Lower80[n], lower80}, {"upper80", cd.Upper80[n], upper80}, {"lower95", cd.Lower95[n], lower95}, {"upper95", cd.Upper95[n], upper95}} {
			if !scalar.EqualWithinAbsOrRel(c.got, c.want, tol, tol) {
				t.Errorf("horizon %d %s: chart %v, view %v", n+1, c.name, c.got, c.want)
			}
		}
		n++
	}
	if err := rows.Err(); err != nil {
		t.Fatal(err)
	}
	if n != 10 || len(cd.FcT) != 10 {
		t.Errorf("view has %d forecasts, chart %d; the tracker's horizon is 10", n, len(cd.FcT))
	}
	var slope, slopeT float64
	if err := pool.QueryRow(ctx, `SELECT slope, slope_t FROM sidetrend.slopes WHERE tracker = 'sales' AND series_key = 'north'`).Scan(&slope, &slopeT); err != nil {
		t.Fatal(err)
	}
	// The segment spans 2 horizons, so its rise is 20 slopes.
	if rise := cd.TrendY[1] - cd.TrendY[0]; !scalar.EqualWithinAbsOrRel(rise, 20*slope, 1e-9, 1e-9) {
		t.Errorf("trend segment rises %v over 20 days, want 20 x slope %v", rise, slope)
	}
	if want := "t = " + strings.TrimSpace(strings.Split(cd.TrendLabel, "t = ")[1]); !strings.Contains(cd.Subtitle, want) {
		t.Errorf("subtitle %q lacks %q", cd.Subtitle, want)
	}
	if !strings.Contains(cd.TrendLabel, "/day") || math.Abs(slopeT) < 2 {
		// salesDB's trend is 0.5 a day against noise of sd 3: |t| well above 2.
		t.Errorf("trend label %q, slope t %v", cd.TrendLabel, slopeT)
	}
}

func TestPlotErrors(t *testing.T) {
	url, _ := salesDB(t)
	ctx := context.Background()
	for _, c := range []struct {
		args []string
		want string
	}{
		{[]string{"--series", "west"}, "sidetrend status"},
		{[]string{"--series", "north", "--from", "31/01/2025"}, "write it as 2025-01-31"},
		{[]string{"--series", "north", "--from", "2030-01-01"}, "give an earlier date"},
		{[]string{"--series", "north", "--width", "20"}, "out of range"},
	} {
		args := append([]string{"plot", "--db", url, "--tracker", "sales", "--out", filepath.Join(t.TempDir(), "x.png")}, c.args...)
		_, err := runCLI(t, ctx, args...)
		if err == nil || !strings.Contains(err.Error(), c.want) {
			t.Errorf("plot %v: error %v, want one that says %q", c.args, err, c.want)
		}
	}
}

func TestDateTicker(t *testing.T) {
	day := calendar.Width{Days: 1}
	lo := time.Date(2025, 2, 1, 0, 0, 0, 0, time.UTC)
	hi := lo.AddDate(0, 0, 84)
	ticks := dateTicker{loc: time.UTC, step: day}.Ticks(float64(lo.Unix()), float64(hi.Unix()))
	var majors []time.Time
	for _, tk := range ticks {
		if tk.Label != "" {
			majors = append(majors, time.Unix(int64(tk.Value), 0).UTC())
		}
	}
	// 84 days: 12 weekly ticks would be too many, so every 14 days, on
	// Mondays; 2025-02-03 is the first Monday after 2025-02-01.
	if len(majors) != 6 || !majors[0].Equal(time.Date(2025, 2, 3, 0, 0, 0, 0, time.UTC)) {
		t.Fatalf("major ticks %v, want 6 fortnightly from Monday 2025-02-03", majors)
	}
	for _, m := range majors {
		if m.Weekday() != time.Monday {
			t.Errorf("major tick %v is not a Monday", m)
		}
	}
}

func TestValueTicker(t *testing.T) {
	for _, c := range []struct {
		lo, hi float64
		want   []string
	}{
		// Range 1250/6 = 208 rounds up to a step of 250.
		{750, 2000, []string{"750", "1000", "1250", "1500", "1750", "2000"}},
		// Range 0.9/6 = 0.15 rounds up to 0.2; labels keep one decimal.
		{0.1, 1, []string{"0.2", "0.4", "0.6", "0.8", "1.0"}},
	} {
		var got []string
		for _, tk := range (valueTicker{}).Ticks(c.lo, c.hi) {
			if tk.Label != "" {
				got = append(got, tk.Label)
			}
		}
		if strings.Join(got, " ") != strings.Join(c.want, " ") {
			t.Errorf("ticks of [%v, %v]: %v, want %v", c.lo, c.hi, got, c.want)
		}
	}
}

// fewPointsChart is a ready daily series of three points whose forecast
// has no interval yet (the bounds are NaN, as the estimator returns them
// while T <= p), with a trend segment along the forecast.
func fewPointsChart() *chartData {
	day0 := time.Date(2025, 3, 1, 0, 0, 0, 0, time.UTC)
	cd := &chartData{Title: "few", YLabel: "sum per day", Loc: time.UTC, Step: calendar.Width{Days: 1}}
	for i, y := range []float64{10, 12, 14} {
		cd.ObsT = append(cd.ObsT, day0.AddDate(0, 0, i))
		cd.ObsY = append(cd.ObsY, y)
	}
	nan := math.NaN()
	for l := 1; l <= 3; l++ {
		cd.FcT = append(cd.FcT, day0.AddDate(0, 0, 2+l))
		cd.Forecast = append(cd.Forecast, 14+2*float64(l))
		cd.Lower80, cd.Upper80 = append(cd.Lower80, nan), append(cd.Upper80, nan)
		cd.Lower95, cd.Upper95 = append(cd.Lower95, nan), append(cd.Upper95, nan)
	}
	cd.TrendT = [2]time.Time{day0.AddDate(0, 0, -1), day0.AddDate(0, 0, 5)}
	cd.TrendY = [2]float64{8, 20}
	return cd
}

// TestChartWithoutInterval draws a forecast whose bounds are not defined
// yet: no bands, no error (it used to fail with "NaN data point").
func TestChartWithoutInterval(t *testing.T) {
	t.Parallel()
	cd := fewPointsChart()
	if xy := bandXYs(cd.FcT, cd.Lower95, cd.Upper95); xy != nil {
		t.Errorf("band outline %v from NaN bounds, want none", xy)
	}
	if err := writeChart(cd, filepath.Join(t.TempDir(), "few.png"), 800, 400); err != nil {
		t.Fatalf("chart without interval: %v", err)
	}
	// Bounds defined for only some horizons: the band covers those.
	cd.Lower95[1], cd.Upper95[1], cd.Lower95[2], cd.Upper95[2] = 15, 21, 16, 24
	if xy := bandXYs(cd.FcT, cd.Lower95, cd.Upper95); len(xy) != 4 {
		t.Errorf("band outline %v, want the 4 corners of horizons 2 and 3", xy)
	}
	if err := writeChart(cd, filepath.Join(t.TempDir(), "part.png"), 800, 400); err != nil {
		t.Fatalf("chart with a partial interval: %v", err)
	}
}

// TestChartYRangeHoldsEverything checks that the value axis holds the
// bands, the one-step forecasts and the trend with room to spare, so
// nothing is cut at the top or bottom of the frame.
func TestChartYRangeHoldsEverything(t *testing.T) {
	t.Parallel()
	cd := fewPointsChart()
	cd.FitT, cd.FitY = cd.ObsT[1:], []float64{40, 11} // a wild one-step forecast
	cd.Lower95 = []float64{-5, -7, -9}
	cd.Upper95 = []float64{30, 33, 36}
	cd.Lower80 = []float64{1, 0, -1}
	cd.Upper80 = []float64{25, 27, 29}
	cd.TrendY = [2]float64{8, 50}
	lo, hi := yRange(cd)
	// Drawn extremes: -9 (lower95 at horizon 3) and 50 (the trend's end).
	if !(lo < -9 && hi > 50) {
		t.Errorf("y range [%v, %v] does not hold [-9, 50] with room", lo, hi)
	}
	if pad := 0.06 * 59; math.Abs((-9-lo)-pad) > 1e-9 || math.Abs((hi-50)-pad) > 1e-9 {
		t.Errorf("y range [%v, %v], want 6 %% of the span 59 free on each side", lo, hi)
	}
}

// TestChartTickLabelsUnique checks that no x tick label repeats, for a
// warming series of one and of two daily points (the axis is then a few
// buckets wide) and for monthly and hourly buckets.
func TestChartTickLabelsUnique(t *testing.T) {
	t.Parallel()
	day0 := time.Date(2025, 3, 1, 0, 0, 0, 0, time.UTC)
	for _, c := range []struct {
		name string
		step calendar.Width
		n    int
	}{
		{"one day", calendar.Width{Days: 1}, 1},
		{"two days", calendar.Width{Days: 1}, 2},
		{"two months", calendar.Width{Months: 1}, 2},
		{"three hours", calendar.Width{Micros: 3600e6}, 3},
	} {
		cd := &chartData{Loc: time.UTC, Step: c.step, Subtitle: "no forecast yet: the model is warming up"}
		t0 := day0
		for i := 0; i < c.n; i++ {
			cd.ObsT, cd.ObsY = append(cd.ObsT, t0), append(cd.ObsY, float64(i))
			t0 = t0.AddDate(0, c.step.Months, c.step.Days).Add(time.Duration(c.step.Micros) * time.Microsecond)
		}
		lo, hi := xRange(cd)
		marker := uniqueLabels{plot.TimeTicks{
			Ticker: dateTicker{loc: cd.Loc, step: cd.Step},
			Format: tickFormat(cd.Step),
			Time:   func(x float64) time.Time { return time.Unix(int64(math.Round(x)), 0).In(cd.Loc) },
		}}
		seen := map[string]bool{}
		labels := 0
		for _, tk := range marker.Ticks(lo, hi) {
			if tk.Label == "" {
				continue
			}
			labels++
			if seen[tk.Label] {
				t.Errorf("%s: tick label %q repeats", c.name, tk.Label)
			}
			seen[tk.Label] = true
		}
		if labels < 2 {
			t.Errorf("%s: %d labelled ticks on [%v, %v], want at least 2", c.name, labels, lo, hi)
		}
		if err := writeChart(cd, filepath.Join(t.TempDir(), "warm.png"), 600, 300); err != nil {
			t.Errorf("%s: %v", c.name, err)
		}
	}
}
