package main

import (
	"errors"
	"fmt"
	"image/color"
	"math"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"time"

	"github.com/urfave/cli/v2"
	"gonum.org/v1/plot"
	"gonum.org/v1/plot/plotter"
	"gonum.org/v1/plot/vg"
	"gonum.org/v1/plot/vg/draw"
	"gonum.org/v1/plot/vg/vgimg"

	"github.com/sidetrend/sidetrend/calendar"
	"github.com/sidetrend/sidetrend/estimator"
	"github.com/sidetrend/sidetrend/pgsync"
)

// chartDPI converts the pixel sizes of --width and --height to the points
// gonum/plot draws in.
const chartDPI = 96

func plotCommand() *cli.Command {
	return &cli.Command{
		Name:      "plot",
		Usage:     "draw one series as a PNG: history, one-step fitted values, forecast with 80 % and 95 % bands, and the slope",
		UsageText: "sidetrend plot --tracker takings --series harbourside [--from 2025-01-01] --out chart.png",
		Flags: []cli.Flag{
			dbFlag,
			&cli.StringFlag{Name: "tracker", Required: true, Usage: "tracker name"},
			&cli.StringFlag{Name: "series", Usage: "series key (the key columns joined by '|'); empty for a tracker without keys"},
			&cli.StringFlag{Name: "from", Usage: "first day shown, as 2006-01-02 or an RFC 3339 time (default: the last 90 buckets or 6 horizons, whichever is more)"},
			&cli.StringFlag{Name: "out", Usage: "PNG file to write (default TRACKER-SERIES.png)"},
			&cli.IntFlag{Name: "width", Value: 1100, Usage: "width in pixels"},
			&cli.IntFlag{Name: "height", Value: 550, Usage: "height in pixels"},
		},
		Action: func(c *cli.Context) error {
			var from time.Time
			if s := c.String("from"); s != "" {
				var err error
				if from, err = parseFrom(s); err != nil {
					return err
				}
			}
			out := c.String("out")
			if out == "" {
				out = chartFileName(c.String("tracker"), c.String("series"))
			}
			pool, err := pgsync.Connect(c.Context, c.String("db"))
			if err != nil {
				return err
			}
			defer pool.Close()
			d, err := pgsync.LoadSeries(c.Context, pool, c.String("tracker"), c.String("series"))
			if errors.Is(err, pgsync.ErrNoSeries) {
				return fmt.Errorf("%w: check the names with `sidetrend status` or SELECT tracker, series_key FROM sidetrend.series_status", err)
			}
			if err != nil {
				return err
			}
			cd, err := buildChart(d, from)
			if err != nil {
				return err
			}
			if err := writeChart(cd, out, c.Int("width"), c.Int("height")); err != nil {
				return err
			}
			fmt.Fprintln(c.App.Writer, "wrote", out)
			return nil
		},
	}
}

// parseFrom reads --from as a date or an RFC 3339 time.
func parseFrom(s string) (time.Time, error) {
	if t, err := time.Parse(time.DateOnly, s); err == nil {
		return t, nil
	}
	if t, err := time.Parse(time.RFC3339, s); err == nil {
		return t, nil
	}
	return time.Time{}, fmt.Errorf("--from %q is not a date: write it as 2025-01-31 or 2025-01-31T08:00:00Z", s)
}

// chartFileName is TRACKER-SERIES.png with characters a file name should
// not have replaced.
func chartFileName(tracker, series string) string {
	name := tracker
	if series != "" {
		name += "-" + series
	}
	name = strings.Map(func(r rune) rune {
		if r == '/' || r == '\\' || r == '|' || r == ':' || r == ' ' || r < 32 {
			return '_'
		}
		return r
	}, name)
	return name + ".png"
}

// chartData is everything a chart shows, in the tracker's time zone.
type chartData struct {
	Title    string
	Subtitle string
	YLabel   string
	Loc      *time.Location
	Step     calendar.Width

	ObsT []time.Time // observed buckets (no gaps)
	ObsY []float64
	FitT []time.Time // one-step forecasts of the scored buckets
	FitY []float64

	FcT                                          []time.Time
	Forecast, Lower80, Upper80, Lower95, Upper95 []float64

	// Trend is the slope drawn as a segment through the level at the newest
	// bucket: (TrendT[0], TrendY[0]) to (TrendT[1], TrendY[1]).
	TrendT     [2]time.Time
	TrendY     [2]float64
	TrendLabel string
}

// buildChart replays the series for its one-step fitted values and takes
// the forecast and slope from the stored state. A zero from shows the last
// max(90, 6 horizons) buckets.
func buildChart(d *pgsync.SeriesData, from time.Time) (*chartData, error) {
	t := d.Tracker
	w, err := calendar.ParseWidth(t.Bucket)
	if err != nil {
		return nil, fmt.Errorf("tracker %q: bucket %q: %w", t.Name, t.Bucket, err)
	}
	cal, err := calendar.New(w, t.TZ)
	if err != nil {
		return nil, fmt.Errorf("tracker %q: %w", t.Name, err)
	}
	cd := &chartData{Loc: cal.Location(), Step: w}
	cd.Title = t.Name
	if d.Key != "" {
		cd.Title += ": " + d.Key
	}
	unit := bucketUnit(w)
	cd.YLabel = fmt.Sprintf("%s per %s", t.Agg, unit)
	if len(d.Values) == 0 {
		return nil, fmt.Errorf("tracker %q series %q has no folded bucket yet: run the sidecar (`sidetrend run`) and try again", t.Name, d.Key)
	}
	if from.IsZero() {
		n := max(90, 6*t.Horizon)
		from = d.Starts[max(0, len(d.Starts)-n)]
	}

	// One-step fitted values: replay the values as the sidecar folded them.
	replay, err := estimator.NewState(d.Spec)
	if err != nil {
		return nil, fmt.Errorf("tracker %q: %w", t.Name, err)
	}
	for i, y := range d.Values {
		if math.IsNaN(y) {
			if err := replay.Skip(1); err != nil {
				return nil, err
			}
			continue
		}
		step, err := replay.Observe(y)
		if err != nil {
			// The sidecar skips a bucket it cannot fold in; so does the replay.
			if err := replay.Skip(1); err != nil {
				return nil, err
			}
			continue
		}
		if d.Starts[i].Before(from) {
			continue
		}
		cd.ObsT, cd.ObsY = append(cd.ObsT, d.Starts[i]), append(cd.ObsY, y)
		if step.Scored {
			cd.FitT, cd.FitY = append(cd.FitT, d.Starts[i]), append(cd.FitY, step.Forecast)
		}
	}
	if len(cd.ObsT) == 0 {
		return nil, fmt.Errorf("--from %s is after the newest folded bucket (%s): give an earlier date",
			from.Format(time.DateOnly), d.Starts[len(d.Starts)-1].Format(time.DateOnly))
	}

	// Forecast and slope from the state the sidecar stored; the replay
	// stands in when there is none or it cannot be read.
	st := replay
	if d.State != nil {
		if stored, err := estimator.UnmarshalState(d.State); err == nil {
			st = stored
		}
	}
	asOf := cal.Start(d.LastIndex).Format(time.DateOnly)
	if !st.Ready() {
		cd.Subtitle = fmt.Sprintf("no forecast yet: the model is warming up (%d points in); as of %s", st.Count(), asOf)
		return cd, nil
	}
	fc, err := st.Forecast(t.Horizon)
	if err != nil {
		return nil, fmt.Errorf("forecast %q/%q: %w", t.Name, d.Key, err)
	}
	for l := 1; l <= t.Horizon; l++ {
		cd.FcT = append(cd.FcT, cal.Start(d.LastIndex+int64(l)))
	}
	cd.Forecast, cd.Lower80, cd.Upper80, cd.Lower95, cd.Upper95 = fc.Forecast, fc.Lower80, fc.Upper80, fc.Lower95, fc.Upper95
	sl, err := st.Slope()
	if err != nil {
		return nil, fmt.Errorf("slope %q/%q: %w", t.Name, d.Key, err)
	}
	tstat := sl.T()
	cd.TrendLabel = fmt.Sprintf("trend %+.3g/%s (t = %.1f)", sl.Slope, unit, tstat)
	bands := "with 80 % and 95 % prediction intervals"
	if bandXYs(cd.FcT, cd.Lower95, cd.Upper95) == nil {
		bands = "without intervals yet (too few points)"
	}
	cd.Subtitle = fmt.Sprintf("as of %s: %s; %d-%s forecast %s", asOf, cd.TrendLabel, t.Horizon, unit, bands)
	// The segment spans one horizon on each side of the newest bucket.
	k := int64(t.Horizon)
	cd.TrendT = [2]time.Time{cal.Start(d.LastIndex - k), cal.Start(d.LastIndex + k)}
	cd.TrendY = [2]float64{sl.Level - sl.Slope*float64(k), sl.Level + sl.Slope*float64(k)}
	return cd, nil
}

// bucketUnit names one bucket for labels: "day", "week", "month", "7 days".
func bucketUnit(w calendar.Width) string {
	switch {
	case w.Months == 1:
		return "month"
	case w.Months == 3:
		return "quarter"
	case w.Months == 12:
		return "year"
	case w.Months > 0:
		return fmt.Sprintf("%d months", w.Months)
	case w.Days == 1:
		return "day"
	case w.Days == 7:
		return "week"
	case w.Days > 0:
		return fmt.Sprintf("%d days", w.Days)
	case w.Micros == 3600e6:
		return "hour"
	case w.Micros == 60e6:
		return "minute"
	default:
		return time.Duration(w.Micros * 1000).String()
	}
}

// Chart palette, chosen for sidetrend rather than taken from a plotting
// library: slate ink for what happened, a muted teal for what the model
// said one bucket ahead, one plum hue for the forecast and both of its
// bands (the bands are the same plum, translucent, so the 80 % band shows
// darker where it lies inside the 95 % one), and ochre for the trend.
var (
	colObserved = color.RGBA{R: 0x3a, G: 0x47, B: 0x50, A: 0xff} // slate
	colFitted   = color.RGBA{R: 0x4a, G: 0x8f, B: 0x8c, A: 0xff} // muted teal
	colForecast = color.RGBA{R: 0x6b, G: 0x2d, B: 0x5c, A: 0xff} // plum
	colTrend    = color.RGBA{R: 0xb3, G: 0x80, B: 0x2a, A: 0xff} // ochre
	colGrid     = color.RGBA{R: 0xe4, G: 0xe1, B: 0xdc, A: 0xff} // warm light grey
)

// Band fills: the forecast's plum at two opacities (premultiplied alpha,
// as image/color wants). Drawn nested, 95 % first, the 80 % band on top
// adds to it.
var (
	colBand95 = translucent(colForecast, 0.16)
	colBand80 = translucent(colForecast, 0.22)
)

func translucent(c color.RGBA, a float64) color.RGBA {
	f := func(v uint8) uint8 { return uint8(math.Round(float64(v) * a)) }
	return color.RGBA{R: f(c.R), G: f(c.G), B: f(c.B), A: uint8(math.Round(255 * a))}
}

// legendWidth is the strip right of the plot that holds the legend, so
// that it never covers data.
const legendWidth = 5.4 * vg.Centimeter

// bandXYs is the outline of the band between lo and hi over the buckets
// where both bounds are finite: along hi forwards, back along lo. It is
// nil when fewer than two buckets have both (no interval yet: the residual
// variance needs more points than the model has terms).
func bandXYs(ts []time.Time, lo, hi []float64) plotter.XYs {
	var keep []int
	for i := range ts {
		if finite(lo[i]) && finite(hi[i]) {
			keep = append(keep, i)
		}
	}
	if len(keep) < 2 {
		return nil
	}
	xy := make(plotter.XYs, 0, 2*len(keep))
	for _, i := range keep {
		xy = append(xy, plotter.XY{X: unix(ts[i]), Y: hi[i]})
	}
	for k := len(keep) - 1; k >= 0; k-- {
		i := keep[k]
		xy = append(xy, plotter.XY{X: unix(ts[i]), Y: lo[i]})
	}
	return xy
}

func finite(x float64) bool { return !math.IsNaN(x) && !math.IsInf(x, 0) }

// yRange is the value axis: every finite value the chart draws (points,
// one-step forecasts, forecast, both bands, the trend segment) with 6 % of
// the span free above and below, so nothing touches or crosses the frame.
func yRange(cd *chartData) (lo, hi float64) {
	lo, hi = math.Inf(1), math.Inf(-1)
	for _, ys := range [][]float64{cd.ObsY, cd.FitY, cd.Forecast, cd.Lower80, cd.Upper80, cd.Lower95, cd.Upper95} {
		for _, y := range ys {
			if finite(y) {
				lo, hi = min(lo, y), max(hi, y)
			}
		}
	}
	if len(cd.FcT) > 0 {
		for _, y := range cd.TrendY {
			if finite(y) {
				lo, hi = min(lo, y), max(hi, y)
			}
		}
	}
	if lo > hi { // nothing finite: any range will do
		return 0, 1
	}
	pad := 0.06 * (hi - lo)
	if pad == 0 {
		pad = max(math.Abs(hi)*0.1, 1)
	}
	return lo - pad, hi + pad
}

// xRange is the time axis: from the first point to the last forecast (or
// trend end), at least four buckets wide so that a series with one or two
// points still gets distinct tick labels, with a little room at the right.
func xRange(cd *chartData) (lo, hi float64) {
	first, last := cd.ObsT[0], cd.ObsT[len(cd.ObsT)-1]
	for _, ts := range [][]time.Time{cd.FcT} {
		if len(ts) > 0 && ts[len(ts)-1].After(last) {
			last = ts[len(ts)-1]
		}
	}
	if len(cd.FcT) > 0 && cd.TrendT[1].After(last) {
		last = cd.TrendT[1]
	}
	if len(cd.FcT) > 0 && cd.TrendT[0].Before(first) && !cd.TrendT[0].IsZero() {
		first = cd.TrendT[0]
	}
	lo, hi = unix(first), unix(last)
	bucket := bucketSeconds(cd.Step)
	if hi-lo < 4*bucket {
		mid := (lo + hi) / 2
		lo, hi = mid-2*bucket, mid+2*bucket
	}
	return lo, hi + (hi-lo)*0.01
}

// bucketSeconds is the nominal length of a bucket in seconds (a month as
// 30.44 days): only for the axis' minimum width.
func bucketSeconds(w calendar.Width) float64 {
	return float64(w.Months)*30.44*86400 + float64(w.Days)*86400 + float64(w.Micros)/1e6
}

// writeChart draws cd into a PNG of wpx by hpx pixels at path.
//
// What is drawn, bottom to top: the 95 % and 80 % bands as nested
// translucent plum fans; the one-step forecasts as a thin teal step line
// (each value held over its bucket, as the model issued it for that
// bucket); the observations as small hollow slate rings, so the line
// under them stays readable; the trend as a thin dashed ochre segment;
// and last the forecast as a solid plum line, thicker than the trend, so
// it stays visible where the two run together.
func writeChart(cd *chartData, path string, wpx, hpx int) error {
	if wpx < 400 || hpx < 250 || wpx > 10000 || hpx > 10000 {
		return fmt.Errorf("chart size %dx%d is out of range: use a width of 400 to 10000 and a height of 250 to 10000 pixels", wpx, hpx)
	}
	if len(cd.ObsT) == 0 {
		return errors.New("chart: no observed bucket to draw")
	}
	p := plot.New()
	p.Title.Text = cd.Title
	if cd.Subtitle != "" {
		p.Title.Text += "\n" + cd.Subtitle
	}
	p.Title.TextStyle.Font.Size = vg.Points(12)
	p.Title.Padding = vg.Points(8)
	p.X.Label.Text = "start of bucket (" + cd.Loc.String() + ")"
	p.Y.Label.Text = cd.YLabel
	p.X.Tick.Marker = uniqueLabels{plot.TimeTicks{
		Ticker: dateTicker{loc: cd.Loc, step: cd.Step},
		Format: tickFormat(cd.Step),
		Time:   func(x float64) time.Time { return time.Unix(int64(math.Round(x)), 0).In(cd.Loc) },
	}}
	p.Y.Tick.Marker = valueTicker{}
	grid := plotter.NewGrid()
	grid.Vertical.Color, grid.Horizontal.Color = colGrid, colGrid
	grid.Vertical.Width, grid.Horizontal.Width = vg.Points(0.6), vg.Points(0.6)
	p.Add(grid)
	legend := plot.NewLegend()
	legend.Left, legend.Top = true, true
	legend.TextStyle.Font.Size = vg.Points(10)
	legend.Padding = vg.Points(4)
	legend.ThumbnailWidth = vg.Points(22)

	// Legend rows, in reading order: what happened, what the model said,
	// the forecast and its bands, the trend. Absent elements are nil.
	var obsL, fitL, fcL, b80L, b95L, trL plot.Thumbnailer
	if len(cd.FcT) > 0 {
		for _, b := range []struct {
			lo, hi []float64
			col    color.Color
			label  string
		}{
			{cd.Lower95, cd.Upper95, colBand95, "95 %"},
			{cd.Lower80, cd.Upper80, colBand80, "80 %"},
		} {
			xy := bandXYs(cd.FcT, b.lo, b.hi)
			if xy == nil {
				continue
			}
			poly, err := plotter.NewPolygon(xy)
			if err != nil {
				return fmt.Errorf("chart: %s: %w", b.label, err)
			}
			poly.Color = b.col
			poly.LineStyle.Width = 0
			p.Add(poly)
			if b.label == "80 %" {
				b80L = poly
			} else {
				b95L = poly
			}
		}
	}

	if fitXY := timeXYs(cd.FitT, cd.FitY); len(fitXY) > 0 {
		fit, err := plotter.NewLine(fitXY)
		if err != nil {
			return fmt.Errorf("chart: one-step forecasts: %w", err)
		}
		fit.Color, fit.Width = colFitted, vg.Points(1)
		fit.StepStyle = plotter.MidStep
		p.Add(fit)
		fitL = fit
	}

	obs, err := plotter.NewScatter(timeXYs(cd.ObsT, cd.ObsY))
	if err != nil {
		return fmt.Errorf("chart: observed values: %w", err)
	}
	obs.GlyphStyle.Color = colObserved
	obs.GlyphStyle.Radius = vg.Points(2.5)
	obs.GlyphStyle.Shape = draw.RingGlyph{}
	p.Add(obs)
	obsL = obs

	if fcXY := timeXYs(cd.FcT, cd.Forecast); len(fcXY) > 0 {
		tr, err := plotter.NewLine(timeXYs(cd.TrendT[:], cd.TrendY[:]))
		if err != nil {
			return fmt.Errorf("chart: trend: %w", err)
		}
		tr.Color, tr.Width = colTrend, vg.Points(1.3)
		tr.Dashes = []vg.Length{vg.Points(7), vg.Points(2), vg.Points(1.5), vg.Points(2)}
		p.Add(tr)

		fc, err := plotter.NewLine(fcXY)
		if err != nil {
			return fmt.Errorf("chart: forecast: %w", err)
		}
		fc.Color, fc.Width = colForecast, vg.Points(2.4)
		p.Add(fc)
		fcL, trL = fc, tr
	}
	for _, e := range []struct {
		label string
		th    plot.Thumbnailer
	}{
		{"observed value", obsL},
		{"one-step forecast", fitL},
		{"forecast", fcL},
		{"80 % prediction interval", b80L},
		{"95 % prediction interval", b95L},
		{"trend now (level, slope)", trL},
	} {
		if e.th != nil {
			legend.Add(e.label, e.th)
		}
	}

	p.X.Min, p.X.Max = xRange(cd)
	p.Y.Min, p.Y.Max = yRange(cd)

	w := vg.Length(wpx) * vg.Inch / chartDPI
	h := vg.Length(hpx) * vg.Inch / chartDPI
	img := vgimg.NewWith(vgimg.UseWH(w, h), vgimg.UseDPI(chartDPI), vgimg.UseBackgroundColor(color.White))
	dc := draw.New(img)
	margin := vg.Points(10)
	p.Draw(draw.Crop(dc, margin, -legendWidth, margin, -margin))
	// The legend goes in the strip to the right, level with the plot's top
	// edge below the title.
	titleH := p.Title.TextStyle.Rectangle(p.Title.Text).Size().Y + p.Title.Padding
	legendArea := draw.Crop(dc, w-legendWidth+vg.Points(6), -margin, 0, -margin-titleH)
	legend.Draw(legendArea)

	if dir := filepath.Dir(path); dir != "" {
		if err := os.MkdirAll(dir, 0o755); err != nil {
			return fmt.Errorf("chart: %w", err)
		}
	}
	f, err := os.Create(path)
	if err != nil {
		return fmt.Errorf("chart: %w", err)
	}
	if _, err := (vgimg.PngCanvas{Canvas: img}).WriteTo(f); err != nil {
		f.Close()
		return fmt.Errorf("chart: write %s: %w", path, err)
	}
	return f.Close()
}

// uniqueLabels keeps the first of major ticks whose labels read the same
// (two ticks within one day under a day format, say) and turns the others
// into minor ticks, so no label repeats.
type uniqueLabels struct{ plot.Ticker }

func (u uniqueLabels) Ticks(min, max float64) []plot.Tick {
	ticks := u.Ticker.Ticks(min, max)
	seen := map[string]bool{}
	for i, tk := range ticks {
		if tk.Label == "" {
			continue
		}
		if seen[tk.Label] {
			ticks[i].Label = ""
		}
		seen[tk.Label] = true
	}
	return ticks
}

func unix(t time.Time) float64 { return float64(t.Unix()) }

func timeXYs(ts []time.Time, ys []float64) plotter.XYs {
	xy := make(plotter.XYs, 0, len(ts))
	for i := range ts {
		if math.IsNaN(ys[i]) || math.IsInf(ys[i], 0) {
			continue
		}
		xy = append(xy, plotter.XY{X: unix(ts[i]), Y: ys[i]})
	}
	return xy
}

// tickFormat is the date layout of the x axis labels for a bucket width.
func tickFormat(w calendar.Width) string {
	switch {
	case w.Months > 0:
		return "2006-01"
	case w.Days > 0:
		return "2006-01-02"
	case w.Micros >= 3600e6:
		return "01-02 15:04"
	default:
		return "15:04"
	}
}

// dateTicker puts major ticks on round calendar boundaries in the tracker's
// zone (days, weeks starting Monday, months), about 5 to 10 of them, with
// minor ticks between.
type dateTicker struct {
	loc  *time.Location
	step calendar.Width
}

func (d dateTicker) Ticks(min, max float64) []plot.Tick {
	lo := time.Unix(int64(math.Floor(min)), 0).In(d.loc)
	hi := time.Unix(int64(math.Ceil(max)), 0).In(d.loc)
	span := hi.Sub(lo)
	type cand struct {
		major, minor func(time.Time) time.Time // next boundary after t
		first        func(time.Time) time.Time // first boundary at or after t
		n            float64                   // approximate major ticks over the span
	}
	day := func(n int) cand {
		return cand{
			major: func(t time.Time) time.Time { return t.AddDate(0, 0, n) },
			minor: func(t time.Time) time.Time { return t.AddDate(0, 0, 1) },
			first: func(t time.Time) time.Time {
				m := midnight(t)
				if m.Before(t) {
					m = m.AddDate(0, 0, 1)
				}
				if n == 7 || n == 14 {
					for m.Weekday() != time.Monday {
						m = m.AddDate(0, 0, 1)
					}
				}
				return m
			},
			n: span.Hours() / 24 / float64(n),
		}
	}
	month := func(n int) cand {
		return cand{
			major: func(t time.Time) time.Time { return t.AddDate(0, n, 0) },
			minor: func(t time.Time) time.Time {
				if n == 1 {
					return t.AddDate(0, 0, 7)
				}
				return t.AddDate(0, 1, 0)
			},
			first: func(t time.Time) time.Time {
				m := time.Date(t.Year(), t.Month(), 1, 0, 0, 0, 0, t.Location())
				if m.Before(t) {
					m = m.AddDate(0, 1, 0)
				}
				for (int(m.Month())-1)%n != 0 {
					m = m.AddDate(0, 1, 0)
				}
				return m
			},
			n: span.Hours() / 24 / 30.4 / float64(n),
		}
	}
	var cands []cand
	if d.step.Micros > 0 && span < 4*24*time.Hour {
		// Sub-day buckets over a short span: the default ticks are fine.
		return plot.DefaultTicks{}.Ticks(min, max)
	}
	if d.step.Months == 0 {
		cands = append(cands, day(1), day(2), day(7), day(14))
	}
	cands = append(cands, month(1), month(2), month(3), month(6), month(12))
	c := cands[len(cands)-1]
	for _, x := range cands {
		if x.n <= 10 {
			c = x
			break
		}
	}
	var ticks []plot.Tick
	for t := c.first(lo); !t.After(hi); t = c.major(t) {
		ticks = append(ticks, plot.Tick{Value: float64(t.Unix()), Label: "major"})
		next := c.major(t)
		for m := c.minor(t); m.Before(next) && !m.After(hi); m = c.minor(m) {
			ticks = append(ticks, plot.Tick{Value: float64(m.Unix())})
		}
	}
	if len(ticks) < 2 {
		return plot.DefaultTicks{}.Ticks(min, max)
	}
	return ticks
}

func midnight(t time.Time) time.Time {
	return time.Date(t.Year(), t.Month(), t.Day(), 0, 0, 0, 0, t.Location())
}

// valueTicker puts about six labelled ticks on round values (1, 2, 2.5 or
// 5 times a power of ten) with a minor tick between each two.
type valueTicker struct{}

func (valueTicker) Ticks(lo, hi float64) []plot.Tick {
	if !(hi > lo) {
		return plot.DefaultTicks{}.Ticks(lo, hi)
	}
	raw := (hi - lo) / 6
	mag := math.Pow(10, math.Floor(math.Log10(raw)))
	step := 10 * mag
	for _, m := range []float64{1, 2, 2.5, 5} {
		if m*mag >= raw {
			step = m * mag
			break
		}
	}
	// As many decimals as the step needs: 0 for 250, 1 for 2.5, 2 for 0.25.
	decimals := 0
	for d := step; decimals < 8 && math.Abs(d-math.Round(d)) > 1e-9*d; d *= 10 {
		decimals++
	}
	var ticks []plot.Tick
	for v := math.Ceil(lo/step) * step; v <= hi+step*1e-9; v += step {
		ticks = append(ticks, plot.Tick{Value: v, Label: strconv.FormatFloat(v, 'f', decimals, 64)})
		if half := v + step/2; half <= hi {
			ticks = append(ticks, plot.Tick{Value: half})
		}
	}
	return ticks
}
