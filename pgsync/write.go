package pgsync

import (
	"fmt"
	"math"
	"time"

	"github.com/sidetrend/sidetrend/estimator"
)

// The per-series numbers writeSeriesSQL takes as two flat arrays with a
// fixed stride, read by subscript: the ints (math.MinInt64 for NULL) and
// the floats (NaN for NULL) of series i (from 0) at [i*stride+1 :
// (i+1)*stride]. Unnesting a column costs Postgres a row in a tuple store
// per series, a subscript of an array without NULLs a multiplication:
// with 26 unnested columns, the unnest was a third of the update's time.
const (
	intFolded = iota
	intFirst
	intPoints
	intNErrors
	intOff // the series' part of the flat forecast arrays: [off+1 : off+h]
	intH
	intIssue     // 1: the forecast is recorded in the history
	intPrune     // 1: older history of the series may be due for deletion
	intSeasonOff // the series' part of the flat season array: [off+1 : off+n]
	intSeasonN
	intStride
)

const (
	floatLambda = iota
	floatLevel
	floatSlope
	floatSlopeSE
	floatSigma
	floatMAE
	floatRMSE
	floatMAPE
	floatBias
	floatCov80
	floatCov95
	floatT80
	floatT95
	floatStride
)

// writeSeriesSQL writes the new rows of every series a batch advanced, and
// the history of the forecasts they serve, in one statement: the history
// rows are the series update's RETURNING, so their arrays are sent and
// sliced once. Values that may be NULL or are of variable width are
// unnested; the numbers come as flat arrays (intStride, floatStride); the
// forecast arrays (forecast and its standard error, cumulative and its
// standard error; the views form the bounds) of all series are one flat
// float8[] per column, each series' part at [off+1 : off+h] (h = 0: no
// forecast, NULL). One statement per series cost a parse, bind and execute
// each and, with its boxed array elements, most of the sidecar's
// allocations; one statement per batch was measured several times faster.
//
// Floats come as NaN for NULL (Postgres compares NaN equal to NaN, so
// nullif and array_replace turn them back into NULLs); the writer sends
// every non-finite number as NaN.
var writeSeriesSQL = func() string {
	in := func(k int) string {
		return fmt.Sprintf("($8::bigint[])[r.i * %d + %d]", intStride, k-intStride+1)
	}
	null := func(k int) string { return fmt.Sprintf("nullif(%s, '%d'::bigint)", in(k), int64(math.MinInt64)) }
	fl := func(k int) string {
		return fmt.Sprintf("nullif(($9::float8[])[r.i * %d + %d], 'NaN')", floatStride, k-floatStride+1)
	}
	sliceOf := func(param, n, off int) string {
		return fmt.Sprintf("CASE WHEN %[2]s > 0 THEN array_replace(($%[1]d::float8[])[%[3]s + 1 : %[3]s + %[2]s], 'NaN', NULL) END",
			param, in(n), in(off))
	}
	slice := func(param int) string { return sliceOf(param, intH, intOff) }
	return `
WITH q AS (
    SELECT r.tid, r.key, r.state, r.ready, r.pending_due, r.last_error, r.last_direction,
           ` + null(intFolded) + ` AS folded,
           ` + null(intFirst) + ` AS first,
           ` + in(intPoints) + ` AS points,
           ` + null(intNErrors) + ` AS n_errors,
           ` + in(intIssue) + ` = 1 AS issue,
           ` + in(intPrune) + ` = 1 AS prune,
           ` + slice(10) + ` AS forecast,
           ` + slice(11) + ` AS se,
           ` + slice(12) + ` AS cum_forecast,
           ` + slice(13) + ` AS cum_se,
           ` + sliceOf(14, intSeasonN, intSeasonOff) + ` AS season,
           ` + fl(floatLambda) + ` AS lambda, ` + fl(floatLevel) + ` AS level,
           ` + fl(floatSlope) + ` AS slope, ` + fl(floatSlopeSE) + ` AS slope_se,
           ` + fl(floatSigma) + ` AS sigma, ` + fl(floatMAE) + ` AS mae,
           ` + fl(floatRMSE) + ` AS rmse, ` + fl(floatMAPE) + ` AS mape,
           ` + fl(floatBias) + ` AS bias, ` + fl(floatCov80) + ` AS cov80,
           ` + fl(floatCov95) + ` AS cov95, ` + fl(floatT80) + ` AS t80,
           ` + fl(floatT95) + ` AS t95
    FROM unnest($1::int[], $2::text[], $3::bytea[], $4::bool[], $5::timestamptz[], $6::text[], $7::text[])
         WITH ORDINALITY AS r(tid, key, state, ready, pending_due, last_error, last_direction, i)
), written AS (
    UPDATE sidetrend.series s SET
        folded_through = q.folded, first_bucket = q.first, points = q.points, state = q.state,
        ready = q.ready, rebuild = false, pending_due = q.pending_due, updated_at = now(),
        lambda = q.lambda, season = q.season, forecast = q.forecast, se = q.se, cum_forecast = q.cum_forecast, cum_se = q.cum_se,
        t80 = q.t80, t95 = q.t95, level = q.level, slope = q.slope, slope_se = q.slope_se,
        sigma = q.sigma, n_errors = q.n_errors, mae = q.mae, rmse = q.rmse, mape = q.mape,
        bias = q.bias, coverage80 = q.cov80, coverage95 = q.cov95,
        last_error = q.last_error, last_direction = q.last_direction, failed = false,
        error_at = CASE WHEN q.last_error IS NOT NULL THEN now() END
    FROM q
    WHERE s.tracker_id = q.tid AND s.series_key = q.key
    RETURNING q.tid, q.key, q.folded AS issued_for, q.forecast, q.se, q.t95, q.issue, q.prune
), issued AS (
    SELECT * FROM written WHERE issue
)` + historyTailSQL
}()

// deleteSeriesSQL drops the rows of series that have no point left.
const deleteSeriesSQL = `
DELETE FROM sidetrend.series s
USING unnest($1::int[], $2::text[]) AS q(tid, key)
WHERE s.tracker_id = q.tid AND s.series_key = q.key`

// seriesRows collects, column by column, the new rows of the series one
// batch advanced, for writeSeriesSQL.
type seriesRows struct {
	tid        []int32
	key        []string
	state      [][]byte
	ready      []bool
	pendingDue []*time.Time
	lastErr    []*string
	lastDir    []*string
	ints       []int64   // intStride per series
	floats     []float64 // floatStride per series
	// forecast, se, cum_forecast, cum_se of every series, one after another (the
	// views form the interval bounds).
	fc [4][]float64
	// season: the seasonal coefficients of every seasonal series, one
	// after another (seasonCoefficients).
	season []float64
}

// newSeriesRows returns columns with room for n series of horizon h: the
// flat forecast columns of a full batch are a few hundred kilobytes, and
// growing them by appending cost a tenth of the drain's CPU.
func newSeriesRows(n, h int) *seriesRows {
	r := &seriesRows{
		tid: make([]int32, 0, n), key: make([]string, 0, n), state: make([][]byte, 0, n),
		ready: make([]bool, 0, n), pendingDue: make([]*time.Time, 0, n),
		lastErr: make([]*string, 0, n), lastDir: make([]*string, 0, n),
		ints: make([]int64, 0, n*intStride), floats: make([]float64, 0, n*floatStride),
	}
	for i := range r.fc {
		r.fc[i] = make([]float64, 0, n*h)
	}
	return r
}

func (r *seriesRows) len() int { return len(r.tid) }

// args are writeSeriesSQL's parameters.
func (r *seriesRows) args() []any {
	return []any{r.tid, r.key, r.state, r.ready, r.pendingDue, r.lastErr, r.lastDir,
		r.ints, r.floats, r.fc[0], r.fc[1], r.fc[2], r.fc[3], r.season}
}

// issue marks the forecast of the row added last for the history; prune
// says whether older issues of the series may be due for deletion.
func (r *seriesRows) issue(prune bool) {
	row := r.ints[len(r.ints)-intStride:]
	row[intIssue] = 1
	if prune {
		row[intPrune] = 1
	}
}

// add appends the row of w with state st (nil: nothing folded yet) and
// returns the forecast it serves, if any.
func (r *seriesRows) add(w *seriesWork, st *estimator.State, pendingDue *time.Time, lastErr *string) *estimator.Forecast {
	nan := math.NaN()
	r.tid = append(r.tid, int32(w.id.tracker))
	r.key = append(r.key, w.id.key)
	r.pendingDue = append(r.pendingDue, pendingDue)
	r.lastErr = append(r.lastErr, lastErr)
	var dir *string
	if w.watch != nil && w.watch.LastDirection != "" {
		d := w.watch.LastDirection
		dir = &d
	}
	r.lastDir = append(r.lastDir, dir)

	ints := [intStride]int64{intFolded: math.MinInt64, intFirst: math.MinInt64, intNErrors: math.MinInt64}
	var floats [floatStride]float64
	for i := range floats {
		floats[i] = nan
	}
	if w.lambda != nil {
		floats[floatLambda] = *w.lambda
	}
	var fc *estimator.Forecast
	ready := st != nil && st.Ready()
	if st == nil {
		r.state = append(r.state, nil)
	} else {
		blob, _ := st.MarshalBinary()
		r.state = append(r.state, blob)
		ints[intFolded], ints[intFirst], ints[intPoints] = w.folded, w.first, st.Count()
	}
	r.ready = append(r.ready, ready)
	if ready {
		if f, err := st.Forecast(w.tracker.Horizon); err == nil {
			fc = f
		}
		if sl, err := st.Slope(); err == nil {
			floats[floatLevel], floats[floatSlope], floats[floatSlopeSE] = sl.Level, sl.Slope, sl.SE
		}
		es := st.Errors()
		ints[intNErrors] = es.N
		floats[floatMAE], floats[floatRMSE], floats[floatMAPE], floats[floatBias] = es.MAE, es.RMSE, es.MAPE, es.Bias
		floats[floatCov80], floats[floatCov95] = es.Cov80, es.Cov95
	}
	ints[intSeasonOff] = int64(len(r.season))
	if ready && st.Spec().Harmonics > 0 {
		n := len(r.season)
		r.season = appendFinite(r.season, seasonCoefficients(st))
		ints[intSeasonN] = int64(len(r.season) - n)
	}
	ints[intOff] = int64(len(r.fc[0]))
	if fc != nil && w.tracker.logScale() {
		toValueScale(fc)
	}
	if fc != nil {
		ints[intH] = int64(len(fc.Forecast))
		for i, col := range [4][]float64{fc.Forecast, fc.SE, fc.CumForecast, fc.CumSE} {
			r.fc[i] = appendFinite(r.fc[i], col)
		}
		floats[floatSigma], floats[floatT80], floats[floatT95] = fc.Sigma, fc.T80, fc.T95
	}
	r.ints = append(r.ints, ints[:]...)
	r.floats = appendFinite(r.floats, floats[:])
	return fc
}

// toValueScale turns the forecast of a state fitted on logarithms into what
// a log tracker serves: forecast exp(log forecast), the median of the value
// when the log errors are symmetric; se stays the standard error on the log
// scale, so that the views form the bounds exp(log forecast -+ t se) (with
// sidetrend.log_bound); cum_forecast is the running sum of the medians,
// and cum_se is NaN (NULL): a sum of log-normal values has no closed-form
// interval. The bound fields are set to exp of the log bounds.
func toValueScale(fc *estimator.Forecast) {
	var cum float64
	for i := range fc.Forecast {
		for _, xs := range [][]float64{fc.Forecast, fc.Lower80, fc.Upper80, fc.Lower95, fc.Upper95} {
			xs[i] = math.Exp(xs[i])
		}
		cum += fc.Forecast[i]
		fc.CumForecast[i] = cum
		fc.CumLower95[i], fc.CumUpper95[i], fc.CumSE[i] = math.NaN(), math.NaN(), math.NaN()
	}
}

// seasonCoefficients returns the seasonal part of theta as pairs (sine,
// cosine) per harmonic, with sine 0 for a harmonic at period/2, which has
// a cosine term only (estimator.Spec.Regressors): the seasonal part of the
// fit at j buckets from the newest is
//
//	sum_h a_h sin(h w j) + c_h cos(h w j),  w = 2 pi / period.
func seasonCoefficients(st *estimator.State) []float64 {
	theta, err := st.Theta()
	if err != nil {
		return nil
	}
	spec := st.Spec()
	out := make([]float64, 0, 2*spec.Harmonics)
	i := spec.Degree + 1
	for h := 1; h <= spec.Harmonics; h++ {
		if 2*float64(h) == spec.Period {
			out = append(out, 0, theta[i])
			i++
			continue
		}
		out = append(out, theta[i], theta[i+1])
		i += 2
	}
	return out
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
