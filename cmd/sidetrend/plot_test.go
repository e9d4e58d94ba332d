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
