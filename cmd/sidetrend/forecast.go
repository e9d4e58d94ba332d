package main

import (
	"encoding/csv"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"math"
	"os"
	"slices"
	"strconv"
	"strings"
	"text/tabwriter"
	"time"

	"github.com/sidetrend/sidetrend/calendar"
	"github.com/sidetrend/sidetrend/estimator"
	"github.com/urfave/cli/v2"
)

// forecastCaution ends the table output of `sidetrend forecast`.
const forecastCaution = "Caution: forecasts and intervals are estimates under model assumptions; decisions stay with people."

// forecastColumns are the columns of the csv and json output (contract).
var forecastColumns = []string{"series_key", "horizon", "period_start", "forecast", "lower80", "upper80",
	"lower95", "upper95", "cum_forecast", "cum_lower95", "cum_upper95", "as_of"}

// forecastTableHeader heads the table output: steps ahead, the bucket, the
// 95 % and 80 % bounds around the forecast, and after a bar the cumulative
// forecast with its 95 % bounds.
var forecastTableHeader = []string{"ahead", "period start", "lower95", "lower80", "forecast", "upper80", "upper95",
	"|", "cum_lower95", "cum_forecast", "cum_upper95"}

// wallLayouts are the time forms without a zone that the CSV may use; they
// are wall-clock time in --tz. Go's parser takes a fractional second after
// the seconds even though the layout has none.
var wallLayouts = []string{"2006-01-02 15:04:05", "2006-01-02T15:04:05", "2006-01-02"}

func forecastCommand() *cli.Command {
	return &cli.Command{
		Name:  "forecast",
		Usage: "forecast the series in a CSV file, without a database",
		UsageText: "sidetrend forecast --csv examples/bakery.csv --time-col date --key-col branch --value-col takings --period 7 --harmonics 2\n" +
			"sidetrend forecast --csv sales.csv --bucket '1 month' --agg sum --format csv",
		Description: "Reads a CSV file with a header: a time column, a value column and an optional key column\n" +
			"naming the series. Times are RFC 3339 (2026-03-01T09:30:00+01:00), or '2006-01-02 15:04:05' or\n" +
			"'2006-01-02', which are wall-clock time in --tz. Rows are bucketed by --bucket in --tz, each\n" +
			"series is fitted by discounted least squares, and the forecasts for the next --horizon buckets\n" +
			"are printed. An empty bucket between two observed ones counts as zero or as a gap (--empty).\n" +
			"Model settings left out (--lambda, --season-lambda, and --harmonics with a --period) are chosen\n" +
			"per series by one-step error; the degree is 1 unless given. A first or last bucket that the rows\n" +
			"cover only in part is left out, with a note on stderr.",
		Flags: append([]cli.Flag{
			&cli.StringFlag{Name: "csv", Required: true, Usage: "CSV file with a header row; - reads standard input"},
			&cli.StringFlag{Name: "time-col", Value: "time", Usage: "name of the time column"},
			&cli.StringFlag{Name: "value-col", Value: "value", Usage: "name of the value column (not needed for --agg count)"},
			&cli.StringFlag{Name: "key-col", Value: "key", Usage: "name of the key column; without it in the file, all rows are one series"},
			&cli.StringFlag{Name: "tz", Value: "UTC", Usage: "time zone the buckets follow, and of times written without an offset"},
			&cli.StringFlag{Name: "bucket", Value: "1 day", Usage: "bucket width as a Postgres interval ('15 minutes', '1 day', '1 month')"},
			&cli.StringFlag{Name: "agg", Value: "sum", Usage: "aggregate per bucket: sum, mean, min, max, last, count"},
			&cli.StringFlag{Name: "empty", Usage: "an empty bucket between two observed ones: zero or gap (default zero for sum and count, gap otherwise)"},
			&cli.IntFlag{Name: "degree", Value: 1, Usage: "polynomial trend degree, 0 to 3"},
			&cli.IntFlag{Name: "horizon", Value: 12, Usage: "buckets to forecast"},
			&cli.StringFlag{Name: "format", Value: "table", Usage: "output: table (for reading), csv or json"},
		}, modelCLIFlags()...),
		Action: func(c *cli.Context) error {
			o, err := forecastOptionsFrom(c)
			if err != nil {
				return err
			}
			series, err := readCSVFlag(c, o)
			if err != nil {
				return err
			}
			var out []seriesForecast
			for _, s := range series {
				fc, err := forecastSeries(s, o, c.App.ErrWriter)
				var short *notReadyError
				if errors.As(err, &short) {
					fmt.Fprintln(c.App.ErrWriter, short.Error())
					continue
				}
				if err != nil {
					return err
				}
				out = append(out, fc)
			}
			return writeForecasts(c.App.Writer, o, out)
		},
	}
}

// forecastOptions are the checked flags of `sidetrend forecast`.
type forecastOptions struct {
	timeCol, valueCol, keyCol string
	keyColSet                 bool // --key-col given: the column must exist
	cal                       calendar.Calendar
	agg                       string
	emptyZero                 bool
	model                     modelFlags
	horizon                   int
	format                    string
}

// readCSVFlag reads the file --csv names (- for standard input).
func readCSVFlag(c *cli.Context, o forecastOptions) ([]*csvSeries, error) {
	name := c.String("csv")
	var in io.Reader = os.Stdin
	if name != "-" {
		f, err := os.Open(name)
		if err != nil {
			return nil, fmt.Errorf("--csv: %w", err)
		}
		defer f.Close()
		in = f
	} else {
		name = "standard input"
	}
	return readForecastCSV(in, name, o)
}

func forecastOptionsFrom(c *cli.Context) (forecastOptions, error) {
	o := forecastOptions{
		timeCol: c.String("time-col"), valueCol: c.String("value-col"), keyCol: c.String("key-col"),
		keyColSet: c.IsSet("key-col"), agg: c.String("agg"), horizon: c.Int("horizon"), format: c.String("format"),
	}
	w, err := calendar.ParseWidth(c.String("bucket"))
	if err != nil {
		return o, fmt.Errorf("--bucket: %w", err)
	}
	if o.cal, err = calendar.New(w, c.String("tz")); err != nil {
		return o, fmt.Errorf("--tz: %w", err)
	}
	switch o.agg {
	case "sum", "mean", "min", "max", "last", "count":
	default:
		return o, fmt.Errorf("--agg %q is not an aggregate: use sum, mean, min, max, last or count", o.agg)
	}
	switch e := c.String("empty"); e {
	case "":
		o.emptyZero = o.agg == "sum" || o.agg == "count"
	case "zero", "gap":
		o.emptyZero = e == "zero"
	default:
		return o, fmt.Errorf("--empty %q is not known: use zero (a bucket without rows is 0) or gap (it is no information)", e)
	}
	switch o.format {
	case "table", "csv", "json":
	default:
		return o, fmt.Errorf("--format %q is not known: use table, csv or json", o.format)
	}
	if o.horizon < 1 || o.horizon > estimator.MaxHorizon {
		return o, fmt.Errorf("--horizon %d is out of range: use 1 to %d buckets", o.horizon, estimator.MaxHorizon)
	}
	// The degree is 1 unless given; the harmonics (with a period) and the
	// forgetting factors left out are chosen per series from its data
	// (estimator.Choose), as lambda => NULL does in sidetrend.track.
	var degree *int
	if c.Command.Name == "forecast" {
		d := c.Int("degree")
		degree = &d
	}
	if o.model, err = modelFlagsFrom(c, degree); err != nil {
		return o, err
	}
	return o, nil
}

// bucketAgg holds what a bucket's rows fold into.
type bucketAgg struct {
	n             int64
	sum, min, max float64
	last          float64
	lastAt        time.Time
}

// csvSeries is one series' buckets as read from the file.
type csvSeries struct {
	key     string
	buckets map[int64]*bucketAgg
	lo, hi  int64       // first and last bucket with rows
	times   []time.Time // every row's time, to tell partly covered buckets
}

// readForecastCSV reads the file and folds its rows into buckets per series,
// returned in key order.
func readForecastCSV(in io.Reader, name string, o forecastOptions) ([]*csvSeries, error) {
	r := csv.NewReader(in)
	r.FieldsPerRecord = -1
	r.ReuseRecord = true
	header, err := r.Read()
	if errors.Is(err, io.EOF) {
		return nil, fmt.Errorf("%s is empty: give a CSV file with a header row (%s,%s,...)", name, o.timeCol, o.valueCol)
	}
	if err != nil {
		return nil, fmt.Errorf("%s: %w", name, err)
	}
	cols := map[string]int{}
	for i, h := range header {
		h = strings.TrimSpace(strings.TrimPrefix(h, "\ufeff"))
		if _, dup := cols[h]; !dup {
			cols[h] = i
		}
	}
	have := strings.Join(slices.Clone(header), ", ")
	find := func(col, flag string) (int, error) {
		i, ok := cols[col]
		if !ok {
			return -1, fmt.Errorf("%s has no column %q (its header has: %s): name the column with %s", name, col, have, flag)
		}
		return i, nil
	}
	ti, err := find(o.timeCol, "--time-col")
	if err != nil {
		return nil, err
	}
	vi := -1
	if _, ok := cols[o.valueCol]; ok || o.agg != "count" {
		if vi, err = find(o.valueCol, "--value-col"); err != nil {
			return nil, err
		}
	}
	ki := -1
	if _, ok := cols[o.keyCol]; ok || o.keyColSet {
		if ki, err = find(o.keyCol, "--key-col"); err != nil {
			return nil, err
		}
	}

	loc := o.cal.Location()
	bySeries := map[string]*csvSeries{}
	for {
		rec, err := r.Read()
		if errors.Is(err, io.EOF) {
			break
		}
		if err != nil {
			return nil, fmt.Errorf("%s: %w", name, err)
		}
		line, _ := r.FieldPos(0)
		field := func(i int, col string) (string, error) {
			if i >= len(rec) {
				return "", fmt.Errorf("%s line %d has %d fields, no %q: give every row all the header's columns", name, line, len(rec), col)
			}
			return strings.TrimSpace(rec[i]), nil
		}
		ts, err := field(ti, o.timeCol)
		if err != nil {
			return nil, err
		}
		at, bucket, err := parseRowTime(ts, o.cal, loc)
		if err != nil {
			return nil, fmt.Errorf("%s line %d: %s %q %v", name, line, o.timeCol, ts, err)
		}
		var v float64
		if vi >= 0 && o.agg != "count" {
			vs, err := field(vi, o.valueCol)
			if err != nil {
				return nil, err
			}
			v, err = strconv.ParseFloat(vs, 64)
			if err != nil || math.IsNaN(v) || math.IsInf(v, 0) {
				return nil, fmt.Errorf("%s line %d: %s %q is not a finite number: write it like 1234.5 (a dot for decimals, no thousands separator)",
					name, line, o.valueCol, vs)
			}
		}
		key := ""
		if ki >= 0 {
			if key, err = field(ki, o.keyCol); err != nil {
				return nil, err
			}
		}
		s := bySeries[key]
		if s == nil {
			s = &csvSeries{key: key, buckets: map[int64]*bucketAgg{}, lo: bucket, hi: bucket}
			bySeries[key] = s
		}
		s.lo, s.hi = min(s.lo, bucket), max(s.hi, bucket)
		s.times = append(s.times, at)
		b := s.buckets[bucket]
		if b == nil {
			b = &bucketAgg{min: v, max: v, last: v, lastAt: at}
			s.buckets[bucket] = b
		}
		b.n++
		b.sum += v
		b.min, b.max = min(b.min, v), max(b.max, v)
		if !at.Before(b.lastAt) { // the later row of two at the same time wins
			b.last, b.lastAt = v, at
		}
	}
	if len(bySeries) == 0 {
		return nil, fmt.Errorf("%s has a header but no rows: give at least one row per series", name)
	}
	out := make([]*csvSeries, 0, len(bySeries))
	for _, s := range bySeries {
		out = append(out, s)
	}
	slices.SortFunc(out, func(a, b *csvSeries) int { return strings.Compare(a.key, b.key) })
	return out, nil
}

// instantLayouts are the times with an offset the CSV reader accepts: RFC
// 3339, and what Postgres writes for a timestamptz (COPY ... CSV, psql):
// a space for the T, fractional seconds when there are any, and an offset
// of hours (+00, -07) or hours and minutes (+05:30).
var instantLayouts = []string{
	time.RFC3339Nano,
	"2006-01-02 15:04:05.999999999Z07",
	"2006-01-02 15:04:05.999999999Z07:00",
	"2006-01-02T15:04:05.999999999Z07",
}

// parseRowTime reads a CSV time and returns it as an instant (for ordering
// rows within a bucket) with its bucket number. A time with an offset is an
// instant; one without is wall-clock time in the calendar's zone.
func parseRowTime(s string, cal calendar.Calendar, loc *time.Location) (time.Time, int64, error) {
	if s == "" {
		return time.Time{}, 0, errors.New("is empty: give every row a time")
	}
	for _, layout := range instantLayouts {
		if t, err := time.Parse(layout, s); err == nil {
			return t, cal.Index(t), nil
		}
	}
	for _, layout := range wallLayouts {
		if w, err := time.Parse(layout, s); err == nil {
			at := time.Date(w.Year(), w.Month(), w.Day(), w.Hour(), w.Minute(), w.Second(), w.Nanosecond(), loc)
			return at, cal.IndexLocal(w), nil
		}
	}
	return time.Time{}, 0, errors.New("is not a time: write RFC 3339 (2026-03-01T09:30:00+01:00) or as Postgres writes it " +
		"(2026-03-01 09:30:00+01), or 2026-03-01 09:30:00 or 2026-03-01 for wall-clock time in --tz")
}

// values returns the series' bucket values from bucket lo to hi; an empty
// bucket in between is 0 or NaN (a gap).
func (s *csvSeries) values(lo, hi int64, agg string, emptyZero bool) []float64 {
	ys := make([]float64, hi-lo+1)
	for i := range ys {
		b := s.buckets[lo+int64(i)]
		switch {
		case b == nil && emptyZero:
			ys[i] = 0
		case b == nil:
			ys[i] = math.NaN()
		case agg == "sum":
			ys[i] = b.sum
		case agg == "mean":
			ys[i] = b.sum / float64(b.n)
		case agg == "min":
			ys[i] = b.min
		case agg == "max":
			ys[i] = b.max
		case agg == "last":
			ys[i] = b.last
		case agg == "count":
			ys[i] = float64(b.n)
		}
	}
	return ys
}

// seriesForecast is one series' fitted model and forecast.
type seriesForecast struct {
	key     string
	lastIdx int64 // the newest bucket
	buckets int   // buckets from the first to the newest
	model   string
	chosen  bool // some setting was chosen from the data
	fc      *estimator.Forecast
}

// notReadyError says a series has too little data for an estimate.
type notReadyError struct {
	key  string
	have int64
	need int
}

func (e *notReadyError) Error() string {
	if e.have >= int64(e.need) {
		return fmt.Sprintf("series %s: %d points do not determine the model yet (too little spread for its terms); left out",
			displayKey(e.key), e.have)
	}
	return fmt.Sprintf("series %s: only %d points, needs %d; left out", displayKey(e.key), e.have, e.need)
}

// seriesValues returns a series' values with partly covered first and
// last buckets left out (told on notes), transformed, and the first and
// last bucket kept.
func seriesValues(s *csvSeries, o forecastOptions, notes io.Writer) ([]float64, int64, int64, error) {
	lo, hi, msgs := s.trimPartial(o.cal.Start)
	for _, m := range msgs {
		fmt.Fprintln(notes, m)
	}
	ys := s.values(lo, hi, o.agg, o.emptyZero)
	err := o.model.transformIn(ys, func(i int) string { return o.cal.Start(lo + int64(i)).Format(time.RFC3339) })
	if err != nil {
		return nil, 0, 0, fmt.Errorf("series %s: %w", displayKey(s.key), err)
	}
	return ys, lo, hi, nil
}

// forecastSeries fits the model to one series and forecasts it.
func forecastSeries(s *csvSeries, o forecastOptions, notes io.Writer) (seriesForecast, error) {
	ys, _, hi, err := seriesValues(s, o, notes)
	if err != nil {
		return seriesForecast{}, err
	}
	var observed int64
	for _, y := range ys {
		if !math.IsNaN(y) {
			observed++
		}
	}
	// The fewest points any model the flags allow needs.
	minSpec := estimator.Spec{Lambda: 1, BurnIn: o.model.burnIn}
	if o.model.degree != nil {
		minSpec.Degree = *o.model.degree
	}
	if h := o.model.harmonics; h != nil && *h > 0 {
		minSpec.Harmonics, minSpec.Period = *h, o.model.period
	}
	need := minSpec.Params() + minSpec.BurnIn
	if observed < int64(need) {
		return seriesForecast{}, &notReadyError{key: s.key, have: observed, need: need}
	}
	spec, ch, err := o.model.choose(ys)
	if errors.Is(err, estimator.ErrNoErrors) {
		return seriesForecast{}, &notReadyError{key: s.key, have: observed, need: need + 1}
	}
	if err != nil {
		return seriesForecast{}, fmt.Errorf("series %s: choose the model: %w", displayKey(s.key), err)
	}
	if ch != nil {
		for _, b := range ch.AtBound {
			fmt.Fprintf(notes, "series %s: %s: the best setting may lie beyond it\n", displayKey(s.key), b)
		}
	}
	st, err := estimator.Fit(spec, ys)
	if err != nil {
		return seriesForecast{}, fmt.Errorf("series %s: fit: %w", displayKey(s.key), err)
	}
	if !st.Ready() {
		return seriesForecast{}, &notReadyError{key: s.key, have: st.Count(), need: spec.Params() + spec.BurnIn}
	}
	fc, err := st.Forecast(o.horizon)
	if err != nil {
		return seriesForecast{}, fmt.Errorf("series %s: forecast: %w", displayKey(s.key), err)
	}
	if o.model.transform == "log" {
		// Forecasts and bounds back on the data's scale: exp of the log
		// forecast is the median forecast; the bounds keep their
		// probability. A sum of medians has no bound by this rule: the
		// cumulative bounds are left out.
		var cum float64
		for i := range fc.Forecast {
			for _, xs := range [][]float64{fc.Forecast, fc.Lower80, fc.Upper80, fc.Lower95, fc.Upper95} {
				xs[i] = math.Exp(xs[i])
			}
			cum += fc.Forecast[i]
			fc.CumForecast[i] = cum
			fc.CumLower95[i], fc.CumUpper95[i], fc.SE[i], fc.CumSE[i] = math.NaN(), math.NaN(), math.NaN(), math.NaN()
		}
	}
	return seriesForecast{key: s.key, lastIdx: hi, buckets: len(ys), model: o.model.modelText(spec), chosen: ch != nil, fc: fc}, nil
}

// displayKey names a series in messages and the table.
func displayKey(k string) string {
	if k == "" {
		return "(all rows)"
	}
	return strconv.Quote(k)
}

// forecastRecord is one output row, in the contract's column order; nil is
// an undefined interval bound (too few points for a residual variance).
type forecastRecord struct {
	SeriesKey   string   `json:"series_key"`
	Horizon     int      `json:"horizon"`
	PeriodStart string   `json:"period_start"`
	Forecast    float64  `json:"forecast"`
	Lower80     *float64 `json:"lower80"`
	Upper80     *float64 `json:"upper80"`
	Lower95     *float64 `json:"lower95"`
	Upper95     *float64 `json:"upper95"`
	CumForecast float64  `json:"cum_forecast"`
	CumLower95  *float64 `json:"cum_lower95"`
	CumUpper95  *float64 `json:"cum_upper95"`
	AsOf        string   `json:"as_of"`
}

func bound(x float64) *float64 {
	if math.IsNaN(x) || math.IsInf(x, 0) {
		return nil
	}
	return &x
}

// records turns the forecasts into output rows.
func records(cal calendar.Calendar, out []seriesForecast) []forecastRecord {
	var recs []forecastRecord
	for _, sf := range out {
		asOf := cal.Start(sf.lastIdx).Format(time.RFC3339)
		fc := sf.fc
		for i := range fc.Forecast {
			recs = append(recs, forecastRecord{
				SeriesKey: sf.key, Horizon: i + 1,
				PeriodStart: cal.Start(sf.lastIdx + int64(i) + 1).Format(time.RFC3339),
				Forecast:    fc.Forecast[i], Lower80: bound(fc.Lower80[i]), Upper80: bound(fc.Upper80[i]),
				Lower95: bound(fc.Lower95[i]), Upper95: bound(fc.Upper95[i]),
				CumForecast: fc.CumForecast[i], CumLower95: bound(fc.CumLower95[i]), CumUpper95: bound(fc.CumUpper95[i]),
				AsOf: asOf,
			})
		}
	}
	return recs
}

func writeForecasts(w io.Writer, o forecastOptions, out []seriesForecast) error {
	recs := records(o.cal, out)
	switch o.format {
	case "json":
		if recs == nil {
			recs = []forecastRecord{}
		}
		enc := json.NewEncoder(w)
		enc.SetIndent("", "  ")
		return enc.Encode(recs)
	case "csv":
		cw := csv.NewWriter(w)
		if err := cw.Write(forecastColumns); err != nil {
			return err
		}
		num := func(x float64) string { return strconv.FormatFloat(x, 'g', -1, 64) }
		opt := func(x *float64) string {
			if x == nil {
				return ""
			}
			return num(*x)
		}
		for _, r := range recs {
			if err := cw.Write([]string{r.SeriesKey, strconv.Itoa(r.Horizon), r.PeriodStart, num(r.Forecast),
				opt(r.Lower80), opt(r.Upper80), opt(r.Lower95), opt(r.Upper95), num(r.CumForecast), opt(r.CumLower95), opt(r.CumUpper95), r.AsOf}); err != nil {
				return err
			}
		}
		cw.Flush()
		return cw.Error()
	}
	return writeForecastTable(w, o, out)
}

// writeForecastTable prints each series as an aligned table for reading,
// then the caution.
func writeForecastTable(w io.Writer, o forecastOptions, out []seriesForecast) error {
	for _, sf := range out {
		fc := sf.fc
		// Six significant digits on the largest forecast, two to six decimals.
		big := 0.0
		for _, y := range fc.CumForecast {
			big = max(big, math.Abs(y))
		}
		dec := 2
		if big > 0 {
			dec = min(max(5-int(math.Floor(math.Log10(big))), 0), 6)
		}
		num := func(x float64) string {
			if math.IsNaN(x) || math.IsInf(x, 0) {
				return "-"
			}
			return strconv.FormatFloat(x, 'f', dec, 64)
		}
		chosen := ""
		if sf.chosen {
			chosen = " (chosen from the data)"
		}
		fmt.Fprintf(w, "series %s: %d buckets of %s in %s up to %s, %s%s, sigma %s\n",
			displayKey(sf.key), sf.buckets, o.cal.Width(), o.cal.Zone(),
			o.cal.Start(sf.lastIdx).Format(time.RFC3339), sf.model, chosen, num(fc.Sigma))
		// The interval as a fan around the forecast, widest bounds outside;
		// the running totals after a bar.
		tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', tabwriter.AlignRight)
		fmt.Fprintln(tw, strings.Join(forecastTableHeader, "\t")+"\t")
		for i := range fc.Forecast {
			start := o.cal.Start(sf.lastIdx + int64(i) + 1).Format(time.RFC3339)
			fmt.Fprintf(tw, "%d\t%s\t%s\t%s\t%s\t%s\t%s\t|\t%s\t%s\t%s\t\n", i+1, start,
				num(fc.Lower95[i]), num(fc.Lower80[i]), num(fc.Forecast[i]), num(fc.Upper80[i]), num(fc.Upper95[i]),
				num(fc.CumLower95[i]), num(fc.CumForecast[i]), num(fc.CumUpper95[i]))
		}
		if err := tw.Flush(); err != nil {
			return err
		}
		fmt.Fprintln(w)
	}
	if len(out) == 0 {
		fmt.Fprintln(w, "no series has enough points for a forecast")
	}
	_, err := fmt.Fprintln(w, forecastCaution)
	return err
}
