package sqlwire

import (
	"context"
	"errors"
	"fmt"
	"math/big"
	"sort"
	"strings"

	"github.com/sidetrend/sidetrend/calendar"
	"github.com/sidetrend/sidetrend/estimator"
)

// Schema is the schema the endpoint's tables live in, on both sides.
const Schema = "sidetrend_live"

// MaxHorizon is the longest forecast the forecast table gives.
const MaxHorizon = 10000

// columnDef is one column of a table. Parameter columns are never NULL and
// their domains decide which rows the table computes.
type columnDef struct {
	name  string
	t     typ
	param bool
}

// tableDef is one of the endpoint's tables.
type tableDef struct {
	name string
	cols []columnDef
	scan func(ctx context.Context, req *scanRequest) (rowIter, error)
}

func (t *tableDef) column(name string) int {
	for i, c := range t.cols {
		if c.name == name {
			return i
		}
	}
	return -1
}

func (t *tableDef) columnList() string {
	names := make([]string, len(t.cols))
	for i, c := range t.cols {
		names[i] = c.name + " " + c.t.String()
	}
	return strings.Join(names, ", ")
}

// scanRequest is what a table scan gets: the source and the domain of each
// column (meaningful for parameter columns).
type scanRequest struct {
	src     Source
	domains []domain
	budget  *budget // nil: unbounded
}

// rowIter yields rows one at a time; a returned row is valid until the
// next call. next returns nil at the end.
type rowIter interface {
	next(ctx context.Context) ([]value, error)
}

var tables = map[string]*tableDef{}

func init() {
	for _, t := range []*tableDef{forecastTable, backtestTable, seriesTable} {
		tables[t.name] = t
	}
}

// Column positions of the forecast table.
const (
	fcTracker = iota
	fcKey
	fcLambda
	fcHorizon
	fcPeriodStart
	fcForecast
	fcLower80
	fcUpper80
	fcLower95
	fcUpper95
	fcCumForecast
	fcCumLower95
	fcCumUpper95
)

var forecastTable = &tableDef{
	name: "forecast",
	cols: []columnDef{
		{"tracker", tText, true}, {"series_key", tText, true}, {"lambda", tFloat8, true},
		{"horizon", tInt4, true}, {"period_start", tTimestamptz, false},
		{"forecast", tFloat8, false}, {"lower80", tFloat8, false}, {"upper80", tFloat8, false},
		{"lower95", tFloat8, false}, {"upper95", tFloat8, false},
		{"cum_forecast", tFloat8, false}, {"cum_lower95", tFloat8, false}, {"cum_upper95", tFloat8, false},
	},
	scan: scanForecast,
}

var backtestTable = &tableDef{
	name: "backtest",
	cols: []columnDef{
		{"tracker", tText, true}, {"series_key", tText, true}, {"lambda", tFloat8, true},
		{"n_errors", tInt8, false}, {"mae", tFloat8, false}, {"rmse", tFloat8, false},
		{"mape", tFloat8, false}, {"coverage95", tFloat8, false},
	},
	scan: scanBacktest,
}

var seriesTable = &tableDef{
	name: "series",
	cols: []columnDef{
		{"tracker", tText, true}, {"series_key", tText, true}, {"points", tInt8, false},
		{"first_bucket", tTimestamptz, false}, {"last_bucket", tTimestamptz, false},
		{"lambda", tFloat8, false}, {"degree", tInt4, false}, {"period", tFloat8, false},
		{"harmonics", tInt4, false}, {"state", tText, false},
	},
	scan: scanSeries,
}

// listSeries asks the source for the series the tracker and series_key
// domains allow: one call per value when they are short lists, one call
// for everything otherwise.
func listSeries(ctx context.Context, req *scanRequest) ([]SeriesInfo, error) {
	const maxCalls = 256
	trackers, tOK := req.domains[0].textSet()
	keys, kOK := req.domains[1].textSet()
	if tOK && len(trackers) == 0 || kOK && len(keys) == 0 {
		return nil, nil
	}
	var calls [][2]*string
	switch {
	case tOK && kOK && len(trackers)*len(keys) <= maxCalls:
		for i := range trackers {
			for j := range keys {
				calls = append(calls, [2]*string{&trackers[i], &keys[j]})
			}
		}
	case tOK && len(trackers) <= maxCalls:
		for i := range trackers {
			calls = append(calls, [2]*string{&trackers[i], nil})
		}
	case kOK && len(keys) <= maxCalls:
		for j := range keys {
			calls = append(calls, [2]*string{nil, &keys[j]})
		}
	default:
		calls = append(calls, [2]*string{nil, nil})
	}
	var out []SeriesInfo
	for _, c := range calls {
		infos, err := req.src.Series(ctx, c[0], c[1])
		if err != nil {
			return nil, sourceError(ctx, "list series", err)
		}
		out = append(out, infos...)
	}
	if len(calls) > 1 && !tOK {
		// Calls per key return each key's series sorted by tracker; merge.
		sort.SliceStable(out, func(i, j int) bool {
			if out[i].Tracker != out[j].Tracker {
				return out[i].Tracker < out[j].Tracker
			}
			return out[i].Key < out[j].Key
		})
	}
	// Drop what the text sets rule out, so nothing is computed for it.
	kept := out[:0]
	for _, s := range out {
		if tOK && !containsString(trackers, s.Tracker) || kOK && !containsString(keys, s.Key) {
			continue
		}
		kept = append(kept, s)
	}
	return kept, nil
}

func containsString(sorted []string, s string) bool {
	i := sort.SearchStrings(sorted, s)
	return i < len(sorted) && sorted[i] == s
}

// sourceError wraps an error of the Source; a cancelled statement reads as
// a cancelled statement, whatever the source made of it.
func sourceError(ctx context.Context, what string, err error) error {
	if ctx.Err() != nil {
		return statementCanceled(ctx)
	}
	var se *sqlError
	if errors.As(err, &se) {
		return se
	}
	return errorf(codeInternal, "%s: %v", what, err)
}

// lambdas returns the lambdas a domain pins down, validated, or ok=false
// when the domain does not pin lambda to a list.
func lambdas(d domain) (out []float64, ok bool, err error) {
	if d.all || d.interval {
		return nil, false, nil
	}
	for _, r := range d.pts {
		f, _ := r.Float64()
		spec := estimator.Spec{Lambda: f}
		if err := spec.Validate(); err != nil {
			return nil, true, errorf(codeInvalidParameter, "%v", err)
		}
		out = append(out, f)
	}
	return out, true, nil
}

// horizons returns the horizons a domain allows, 1..MaxHorizon, or an
// error saying what condition to add.
func horizons(d domain) ([]int, error) {
	need := notSupported("sidetrend_live.forecast needs a condition that bounds horizon, such as WHERE horizon <= 30").
		withHint("any horizon from 1 to %d buckets ahead can be asked for; use <=, <, =, IN or BETWEEN on horizon", MaxHorizon)
	if d.all {
		return nil, need
	}
	if !d.interval {
		var out []int
		for _, r := range d.pts {
			if !r.IsInt() {
				continue // no integer horizon equals a fraction
			}
			n := r.Num()
			if !n.IsInt64() || n.Int64() < 1 || n.Int64() > MaxHorizon {
				return nil, errorf(codeInvalidParameter, "horizon %s is out of range: forecasts run from horizon 1 to %d", r.RatString(), MaxHorizon)
			}
			out = append(out, int(n.Int64()))
		}
		return out, nil
	}
	if d.hi == nil {
		return nil, need
	}
	hi := floorRat(d.hi, d.hiInc)
	if hi.Cmp(big.NewInt(MaxHorizon)) > 0 {
		return nil, errorf(codeInvalidParameter, "horizon up to %s is beyond the longest forecast: use a bound of at most %d, such as WHERE horizon <= %d",
			hi.String(), MaxHorizon, MaxHorizon)
	}
	lo := big.NewInt(1)
	if d.lo != nil {
		if l := ceilRat(d.lo, d.loInc); l.Cmp(lo) > 0 {
			lo = l
		}
	}
	var out []int
	for h := lo.Int64(); h <= hi.Int64(); h++ {
		out = append(out, int(h))
	}
	return out, nil
}

// floorRat is the largest integer <= r (< r when !inclusive).
func floorRat(r *big.Rat, inclusive bool) *big.Int {
	q, m := new(big.Int).DivMod(r.Num(), r.Denom(), new(big.Int))
	if m.Sign() == 0 && !inclusive {
		q.Sub(q, big.NewInt(1))
	}
	return q
}

// ceilRat is the smallest integer >= r (> r when !inclusive).
func ceilRat(r *big.Rat, inclusive bool) *big.Int {
	q, m := new(big.Int).DivMod(r.Num(), r.Denom(), new(big.Int))
	if m.Sign() != 0 || !inclusive {
		q.Add(q, big.NewInt(1))
	}
	return q
}

// forecastIter computes forecasts one (series, lambda) at a time.
type forecastIter struct {
	req      *scanRequest
	infos    []SeriesInfo
	lambdas  []float64 // nil: the stored state and its lambda
	horizons []int
	maxH     int

	started bool
	done    bool
	si, li  int
	hi      int
	values  []float64 // of infos[si], loaded once for what-if refits
	fc      *estimator.Forecast
	lambda  float64
	row     []value
}

func scanForecast(ctx context.Context, req *scanRequest) (rowIter, error) {
	hs, err := horizons(req.domains[fcHorizon])
	if err != nil {
		return nil, err
	}
	ls, pinned, err := lambdas(req.domains[fcLambda])
	if err != nil {
		return nil, err
	}
	if len(hs) == 0 || pinned && len(ls) == 0 {
		return emptyIter{}, nil
	}
	infos, err := listSeries(ctx, req)
	if err != nil {
		return nil, err
	}
	nl := 1
	if pinned {
		nl = len(ls)
	}
	if err := req.budget.expect(int64(len(infos))*int64(nl)*int64(len(hs)),
		fmt.Sprintf("%d series x %s x %s", len(infos), plural(nl, "lambda"), plural(len(hs), "horizon"))); err != nil {
		return nil, err
	}
	it := &forecastIter{req: req, infos: infos, horizons: hs, maxH: hs[len(hs)-1],
		row: make([]value, fcCumUpper95+1)}
	if pinned {
		it.lambdas = ls
	}
	return it, nil
}

func (it *forecastIter) next(ctx context.Context) ([]value, error) {
	for it.fc == nil || it.hi >= len(it.horizons) {
		if it.done {
			return nil, nil
		}
		if err := it.advance(ctx); err != nil {
			return nil, err
		}
	}
	info := &it.infos[it.si]
	h := it.horizons[it.hi]
	it.hi++
	k := h - 1
	r := it.row
	r[fcTracker], r[fcKey] = textVal(info.Tracker), textVal(info.Key)
	r[fcLambda], r[fcHorizon] = float8Val(it.lambda), int4Val(int64(h))
	r[fcPeriodStart] = nullOf(tTimestamptz)
	if info.Calendar.Width() != (calendar.Width{}) {
		r[fcPeriodStart] = timeVal(info.Calendar.Start(info.LastIndex + int64(h)))
	}
	fc := it.fc
	r[fcForecast] = float8OrNull(fc.Forecast[k])
	r[fcLower80], r[fcUpper80] = float8OrNull(fc.Lower80[k]), float8OrNull(fc.Upper80[k])
	r[fcLower95], r[fcUpper95] = float8OrNull(fc.Lower95[k]), float8OrNull(fc.Upper95[k])
	r[fcCumForecast] = float8OrNull(fc.CumForecast[k])
	r[fcCumLower95], r[fcCumUpper95] = float8OrNull(fc.CumLower95[k]), float8OrNull(fc.CumUpper95[k])
	return r, nil
}

// advance moves to the next (series, lambda) whose fit is ready and
// computes its forecast, or sets done.
func (it *forecastIter) advance(ctx context.Context) error {
	for {
		if it.started {
			it.li++
			if it.lambdas == nil || it.li >= len(it.lambdas) {
				it.si++
				it.li = 0
				it.values = nil
			}
		}
		it.started = true
		it.fc = nil
		if it.si >= len(it.infos) {
			it.done = true
			return nil
		}
		if ctx.Err() != nil {
			return statementCanceled(ctx)
		}
		info := &it.infos[it.si]
		var st *estimator.State
		if it.lambdas == nil {
			s, err := it.req.src.State(ctx, info.Tracker, info.Key)
			if err != nil {
				return sourceError(ctx, fmt.Sprintf("read the state of series %q/%q", info.Tracker, info.Key), err)
			}
			if s == nil {
				continue
			}
			st = s
			it.lambda = info.Spec.Lambda
		} else {
			if it.values == nil {
				ys, err := it.req.src.Values(ctx, info.Tracker, info.Key)
				if err != nil {
					return sourceError(ctx, fmt.Sprintf("read the values of series %q/%q", info.Tracker, info.Key), err)
				}
				it.values = ys
			}
			spec := info.Spec
			spec.Lambda = it.lambdas[it.li]
			s, err := estimator.Fit(spec, it.values)
			if err != nil {
				return errorf(codeInvalidParameter, "refit series %q/%q with lambda %v: %v", info.Tracker, info.Key, spec.Lambda, err)
			}
			st = s
			it.lambda = spec.Lambda
		}
		if !st.Ready() {
			continue // a series still warming up has no forecast
		}
		fc, err := st.Forecast(it.maxH)
		if err != nil {
			return errorf(codeInternal, "forecast series %q/%q: %v", info.Tracker, info.Key, err)
		}
		it.fc = fc
		it.hi = 0
		return nil
	}
}

type emptyIter struct{}

func (emptyIter) next(context.Context) ([]value, error) { return nil, nil }

// sliceIter yields precomputed rows.
type sliceIter struct {
	rows [][]value
	i    int
}

func (it *sliceIter) next(ctx context.Context) ([]value, error) {
	if it.i >= len(it.rows) {
		return nil, nil
	}
	it.i++
	return it.rows[it.i-1], nil
}

// backtestIter runs estimator.Backtest one (series, lambda) at a time.
type backtestIter struct {
	req     *scanRequest
	infos   []SeriesInfo
	lambdas []float64
	si, li  int
	values  []float64
	row     []value
}

func scanBacktest(ctx context.Context, req *scanRequest) (rowIter, error) {
	ls, pinned, err := lambdas(req.domains[2])
	if err != nil {
		return nil, err
	}
	if !pinned {
		ls = estimator.DefaultGrid()
		ls = filterLambdas(ls, req.domains[2])
	}
	if len(ls) == 0 {
		return emptyIter{}, nil
	}
	infos, err := listSeries(ctx, req)
	if err != nil {
		return nil, err
	}
	if err := req.budget.expect(int64(len(infos))*int64(len(ls)),
		fmt.Sprintf("%d series x %s", len(infos), plural(len(ls), "lambda"))); err != nil {
		return nil, err
	}
	return &backtestIter{req: req, infos: infos, lambdas: ls, row: make([]value, 8)}, nil
}

// filterLambdas keeps the grid lambdas inside an interval domain.
func filterLambdas(ls []float64, d domain) []float64 {
	if !d.interval {
		return ls
	}
	var out []float64
	for _, l := range ls {
		if d.contains(new(big.Rat).SetFloat64(l)) {
			out = append(out, l)
		}
	}
	return out
}

func (it *backtestIter) next(ctx context.Context) ([]value, error) {
	for it.si < len(it.infos) {
		if it.li >= len(it.lambdas) {
			it.si++
			it.li = 0
			it.values = nil
			continue
		}
		if err := ctx.Err(); err != nil {
			return nil, statementCanceled(ctx)
		}
		info := &it.infos[it.si]
		if it.values == nil {
			ys, err := it.req.src.Values(ctx, info.Tracker, info.Key)
			if err != nil {
				return nil, sourceError(ctx, fmt.Sprintf("read the values of series %q/%q", info.Tracker, info.Key), err)
			}
			it.values = ys
		}
		spec := info.Spec
		spec.Lambda = it.lambdas[it.li]
		it.li++
		es, err := estimator.Backtest(spec, it.values)
		if err != nil {
			return nil, errorf(codeInvalidParameter, "backtest series %q/%q with lambda %v: %v", info.Tracker, info.Key, spec.Lambda, err)
		}
		r := it.row
		r[0], r[1], r[2] = textVal(info.Tracker), textVal(info.Key), float8Val(spec.Lambda)
		r[3] = int8Val(es.N)
		r[4], r[5] = float8OrNull(es.MAE), float8OrNull(es.RMSE)
		r[6], r[7] = float8OrNull(es.MAPE), float8OrNull(es.Cov95)
		return r, nil
	}
	return nil, nil
}

func scanSeries(ctx context.Context, req *scanRequest) (rowIter, error) {
	infos, err := listSeries(ctx, req)
	if err != nil {
		return nil, err
	}
	if err := req.budget.expect(int64(len(infos)), fmt.Sprintf("%d series", len(infos))); err != nil {
		return nil, err
	}
	rows := make([][]value, len(infos))
	for i, s := range infos {
		period := float8Val(s.Spec.Period)
		if s.Spec.Period == 0 {
			period = nullOf(tFloat8)
		}
		first, last := nullOf(tTimestamptz), nullOf(tTimestamptz)
		if !s.FirstBucket.IsZero() {
			first = timeVal(s.FirstBucket)
		}
		if !s.LastBucket.IsZero() {
			last = timeVal(s.LastBucket)
		}
		rows[i] = []value{
			textVal(s.Tracker), textVal(s.Key), int8Val(s.Points), first, last,
			float8OrNull(s.Spec.Lambda), int4Val(int64(s.Spec.Degree)), period,
			int4Val(int64(s.Spec.Harmonics)), textVal(s.State),
		}
	}
	return &sliceIter{rows: rows}, nil
}
