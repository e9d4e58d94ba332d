package pgsync

import (
	"math"
	"time"

	"github.com/sidetrend/sidetrend/estimator"
)

// updateSeriesSQL writes the new rows of every series a batch advanced in
// one statement: the per-series values come as parallel arrays, unnested,
// and the forecast arrays (yhat and its standard error, cumulative and its
// standard error; the forecasts view forms the bounds) of all series as one
// flat float8[] per column, each series' part at [off+1 : off+h] (h = 0: no
// forecast, NULL). One statement per series cost a parse, bind and execute
// each and, with its boxed array elements, most of the sidecar's
// allocations; this form was measured several times faster.
//
// Floats come as NaN for NULL (Postgres compares NaN equal to NaN, so
// nullif and array_replace turn them back into NULLs); the writer sends
// every non-finite number as NaN.
const updateSeriesSQL = `
UPDATE sidetrend.series s SET
    folded_through = q.folded, first_bucket = q.first, points = q.points, state = q.state,
    ready = q.ready, rebuild = false, pending_due = q.pending_due, updated_at = now(),
    lambda = nullif(q.lambda, 'NaN'),
    yhat     = CASE WHEN q.h > 0 THEN array_replace(($24::float8[])[q.off + 1 : q.off + q.h], 'NaN', NULL) END,
    se       = CASE WHEN q.h > 0 THEN array_replace(($25::float8[])[q.off + 1 : q.off + q.h], 'NaN', NULL) END,
    cum_yhat = CASE WHEN q.h > 0 THEN array_replace(($26::float8[])[q.off + 1 : q.off + q.h], 'NaN', NULL) END,
    cum_se   = CASE WHEN q.h > 0 THEN array_replace(($27::float8[])[q.off + 1 : q.off + q.h], 'NaN', NULL) END,
    t80 = nullif(q.t80, 'NaN'), t95 = nullif(q.t95, 'NaN'),
    level = nullif(q.level, 'NaN'), slope = nullif(q.slope, 'NaN'),
    slope_se = nullif(q.slope_se, 'NaN'), sigma = nullif(q.sigma, 'NaN'),
    n_errors = q.n_errors, mae = nullif(q.mae, 'NaN'), rmse = nullif(q.rmse, 'NaN'),
    mape = nullif(q.mape, 'NaN'), bias = nullif(q.bias, 'NaN'),
    coverage80 = nullif(q.cov80, 'NaN'), coverage95 = nullif(q.cov95, 'NaN'),
    last_error = q.last_error, last_direction = q.last_direction
FROM unnest($1::int[], $2::text[], $3::bigint[], $4::bigint[], $5::bigint[], $6::bytea[], $7::bool[],
            $8::timestamptz[], $9::float8[], $10::int[], $11::int[],
            $12::float8[], $13::float8[], $14::float8[], $15::float8[], $16::bigint[],
            $17::float8[], $18::float8[], $19::float8[], $20::float8[], $21::float8[], $22::float8[],
            $23::text[], $28::text[], $29::float8[], $30::float8[])
     AS q(tid, key, folded, first, points, state, ready, pending_due, lambda, off, h,
          level, slope, slope_se, sigma, n_errors, mae, rmse, mape, bias, cov80, cov95,
          last_error, last_direction, t80, t95)
WHERE s.tracker_id = q.tid AND s.series_key = q.key`

// deleteSeriesSQL drops the rows of series that have no point left.
const deleteSeriesSQL = `
DELETE FROM sidetrend.series s
USING unnest($1::int[], $2::text[]) AS q(tid, key)
WHERE s.tracker_id = q.tid AND s.series_key = q.key`

// seriesRows collects, column by column, the new rows of the series one
// batch advanced, for updateSeriesSQL.
type seriesRows struct {
	tid        []int32
	key        []string
	folded     []*int64
	first      []*int64
	points     []int64
	state      [][]byte
	ready      []bool
	pendingDue []*time.Time
	lambda     []float64
	off, h     []int32
	level      []float64
	slope      []float64
	slopeSE    []float64
	sigma      []float64
	nErrors    []*int64
	mae, rmse  []float64
	mape, bias []float64
	cov80      []float64
	cov95      []float64
	lastErr    []*string
	lastDir    []*string
	t80, t95   []float64
	// yhat, se, cum_yhat, cum_se of every series, one after another (the
	// forecasts view forms the interval bounds).
	fc [4][]float64
}

// newSeriesRows returns columns with room for n series of horizon h: the
// flat forecast columns of a full batch are a few hundred kilobytes, and
// growing them by appending cost a tenth of the drain's CPU.
func newSeriesRows(n, h int) *seriesRows {
	r := &seriesRows{
		tid: make([]int32, 0, n), key: make([]string, 0, n), folded: make([]*int64, 0, n),
		first: make([]*int64, 0, n), points: make([]int64, 0, n), state: make([][]byte, 0, n),
		ready: make([]bool, 0, n), pendingDue: make([]*time.Time, 0, n), lambda: make([]float64, 0, n),
		off: make([]int32, 0, n), h: make([]int32, 0, n), level: make([]float64, 0, n),
		slope: make([]float64, 0, n), slopeSE: make([]float64, 0, n), sigma: make([]float64, 0, n),
		nErrors: make([]*int64, 0, n), mae: make([]float64, 0, n), rmse: make([]float64, 0, n),
		mape: make([]float64, 0, n), bias: make([]float64, 0, n), cov80: make([]float64, 0, n),
		cov95: make([]float64, 0, n), lastErr: make([]*string, 0, n), lastDir: make([]*string, 0, n),
		t80: make([]float64, 0, n), t95: make([]float64, 0, n),
	}
	for i := range r.fc {
		r.fc[i] = make([]float64, 0, n*h)
	}
	return r
}

func (r *seriesRows) len() int { return len(r.tid) }

// args are updateSeriesSQL's parameters.
func (r *seriesRows) args() []any {
	return []any{r.tid, r.key, r.folded, r.first, r.points, r.state, r.ready,
		r.pendingDue, r.lambda, r.off, r.h,
		r.level, r.slope, r.slopeSE, r.sigma, r.nErrors,
		r.mae, r.rmse, r.mape, r.bias, r.cov80, r.cov95,
		r.lastErr, r.fc[0], r.fc[1], r.fc[2], r.fc[3], r.lastDir, r.t80, r.t95}
}

// add appends the row of w with state st (nil: nothing folded yet) and
// returns the forecast it serves, if any.
func (r *seriesRows) add(w *seriesWork, st *estimator.State, pendingDue *time.Time, lastErr *string) *estimator.Forecast {
	nan := math.NaN()
	r.tid = append(r.tid, int32(w.id.tracker))
	r.key = append(r.key, w.id.key)
	r.pendingDue = append(r.pendingDue, pendingDue)
	lambda := nan
	if w.lambda != nil {
		lambda = *w.lambda
	}
	r.lambda = append(r.lambda, lambda)
	r.lastErr = append(r.lastErr, lastErr)
	var dir *string
	if w.watch != nil && w.watch.LastDirection != "" {
		d := w.watch.LastDirection
		dir = &d
	}
	r.lastDir = append(r.lastDir, dir)

	var fc *estimator.Forecast
	var sl estimator.Slope
	slErr := estimator.ErrNotReady
	var es estimator.ErrorStats
	ready := st != nil && st.Ready()
	if st == nil {
		r.folded, r.first = append(r.folded, nil), append(r.first, nil)
		r.points, r.state = append(r.points, 0), append(r.state, nil)
	} else {
		folded, first := w.folded, w.first
		blob, _ := st.MarshalBinary()
		r.folded, r.first = append(r.folded, &folded), append(r.first, &first)
		r.points, r.state = append(r.points, st.Count()), append(r.state, blob)
	}
	r.ready = append(r.ready, ready)
	if ready {
		if f, err := st.Forecast(w.tracker.Horizon); err == nil {
			fc = f
		}
		sl, slErr = st.Slope()
		es = st.Errors()
	}

	r.off = append(r.off, int32(len(r.fc[0])))
	sigma, t80, t95 := nan, nan, nan
	if fc != nil {
		r.h = append(r.h, int32(len(fc.Yhat)))
		for i, col := range [4][]float64{fc.Yhat, fc.SE, fc.CumYhat, fc.CumSE} {
			r.fc[i] = appendFinite(r.fc[i], col)
		}
		sigma, t80, t95 = fc.Sigma, fc.T80, fc.T95
	} else {
		r.h = append(r.h, 0)
	}
	r.t80, r.t95 = append(r.t80, finiteOrNaN(t80)), append(r.t95, finiteOrNaN(t95))
	r.sigma = append(r.sigma, finiteOrNaN(sigma))
	if slErr == nil {
		r.level = append(r.level, finiteOrNaN(sl.Level))
		r.slope = append(r.slope, finiteOrNaN(sl.Slope))
		r.slopeSE = append(r.slopeSE, finiteOrNaN(sl.SE))
	} else {
		r.level, r.slope, r.slopeSE = append(r.level, nan), append(r.slope, nan), append(r.slopeSE, nan)
	}
	if ready {
		n := es.N
		r.nErrors = append(r.nErrors, &n)
		r.mae, r.rmse = append(r.mae, finiteOrNaN(es.MAE)), append(r.rmse, finiteOrNaN(es.RMSE))
		r.mape, r.bias = append(r.mape, finiteOrNaN(es.MAPE)), append(r.bias, finiteOrNaN(es.Bias))
		r.cov80, r.cov95 = append(r.cov80, finiteOrNaN(es.Cov80)), append(r.cov95, finiteOrNaN(es.Cov95))
	} else {
		r.nErrors = append(r.nErrors, nil)
		r.mae, r.rmse = append(r.mae, nan), append(r.rmse, nan)
		r.mape, r.bias = append(r.mape, nan), append(r.bias, nan)
		r.cov80, r.cov95 = append(r.cov80, nan), append(r.cov95, nan)
	}
	return fc
}

// finiteOrNaN maps the infinities to NaN, the writer's mark for NULL.
func finiteOrNaN(x float64) float64 {
	if math.IsInf(x, 0) {
		return math.NaN()
	}
	return x
}

func appendFinite(dst, xs []float64) []float64 {
	for _, x := range xs {
		dst = append(dst, finiteOrNaN(x))
	}
	return dst
}
