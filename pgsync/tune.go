package pgsync

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"log/slog"
	"math"
	"runtime"
	"sort"
	"sync"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgxpool"

	"github.com/sidetrend/sidetrend/estimator"
)

// TuneOptions says what Tune looks at and whether it changes anything.
type TuneOptions struct {
	// Tracker is the tracker's name; empty means every active tracker.
	Tracker string
	// PerSeries searches a lambda for each series on its own, besides the
	// tracker-wide search over all series together.
	PerSeries bool
	// Apply stores the chosen lambda (trackers.lambda tracker-wide, with the
	// series' own lambdas cleared; series.lambda with PerSeries) and marks
	// the series for replay (series.rebuild).
	Apply bool
	// Model, with Apply and without PerSeries, also switches the tracker's
	// degree and harmonics to the model with the smallest one-step errors,
	// at that model's own best lambda.
	Model bool
	// Search bounds the lambda search; zero values take the estimator's
	// defaults (40 lambdas from 0.5 to 0.999, then golden section).
	Search estimator.SearchOptions
	// Progress, if set, is told about series loaded and searches done.
	Progress Progress
}

// ModelScore is one model of the comparison: its own best lambda, and the
// RMSE of its one-step errors on the buckets every model of the comparison
// scored (so that all have the same count N).
type ModelScore struct {
	Degree    int     `json:"degree"`
	Period    float64 `json:"period"`
	Harmonics int     `json:"harmonics"`
	Lambda    float64 `json:"lambda"`
	RMSE      float64 `json:"rmse"`
	N         int64   `json:"n"`
	Current   bool    `json:"current"`
}

// TuneResult is the lambda search of one tracker (SeriesKey nil: all its
// series together) or of one series.
type TuneResult struct {
	Tracker   string
	SeriesKey *string
	Series    int   // series the result covers
	Points    int64 // bucket values they hold (gaps excluded)
	// LambdaBefore is the lambda in use: the tracker's, or the series' own.
	LambdaBefore float64
	// Lambda is the one the search chose, MemoryBuckets its effective
	// memory 1/(1 - lambda) in buckets; NaN when nothing could be scored.
	Lambda, MemoryBuckets float64
	// RMSEBefore and RMSEAfter are sqrt(mean squared one-step error after
	// burn-in) at the lambda in use and at the chosen one.
	RMSEBefore, RMSEAfter float64
	N                     int64 // one-step errors scored at the chosen lambda

	// Tracker-wide results only: the search's grid, and the model
	// comparison (Models[Best] has the smallest RMSE; -1 when none scored).
	Curve  []estimator.CurvePoint
	Models []ModelScore
	Best   int

	Applied       bool // the lambda was stored and the series marked for replay
	ModelSwitched bool // the tracker's degree and harmonics were changed too
	Note          string
}

// autoApplyGain is the smallest relative RMSE improvement for which the
// sidecar applies a new lambda by itself (a tracker created with lambda =>
// NULL): applying replays every series, which a smaller gain does not pay for.
const autoApplyGain = 1e-3

// tuneLockKey is the first key of the advisory lock a sidecar holds while it
// tunes a tracker (the second is the tracker id): "sdtune" in ASCII.
const tuneLockKey = 0x7364_7475

// Tune runs the lambda search for one tracker or all, compares the model
// with one simpler and one richer one, stores the results in
// sidetrend.tuning (where sidetrend.tune() reads them) and, with Apply,
// applies them. With PerSeries the tracker-wide result still comes first for
// each tracker, followed by one result per series.
func Tune(ctx context.Context, pool *pgxpool.Pool, o TuneOptions) ([]TuneResult, error) {
	if o.Model && o.PerSeries && o.Apply {
		return nil, errors.New("the model is chosen per tracker, not per series: run --apply --model without --per-series first, then --per-series --apply for the lambdas")
	}
	ts, err := LoadTrackers(ctx, pool)
	if err != nil {
		return nil, err
	}
	var picked []*Tracker
	for _, id := range sortedIDs(ts) {
		t := ts[id]
		if (o.Tracker == "" && t.Status == "active") || t.Name == o.Tracker {
			picked = append(picked, t)
		}
	}
	if o.Tracker != "" && len(picked) == 0 {
		return nil, fmt.Errorf("no tracker named %q: see SELECT tracker FROM sidetrend.tracker_settings", o.Tracker)
	}
	var out []TuneResult
	for _, t := range picked {
		tr, err := tuneTracker(ctx, pool, t, o.PerSeries, o.Search, o.Progress)
		if err != nil {
			return out, err
		}
		apply := applyNone
		switch {
		case o.Apply && o.PerSeries:
			apply = applySeries
		case o.Apply:
			apply = applyTracker
		}
		if err := storeTuning(ctx, pool, t, tr, o.PerSeries, apply, o.Apply && o.Model); err != nil {
			return out, err
		}
		out = append(out, tr.tracker)
		out = append(out, tr.series...)
	}
	return out, nil
}

// TuneStored computes the tracker-wide and per-series results of one
// tracker and stores them for sidetrend.tune(). For a tracker that chooses
// its lambda itself (created with lambda => NULL, or auto_tune) it also
// applies the tracker-wide lambda when that lowers the one-step RMSE by
// more than 0.1 %; applied then says the series wait for a replay. Another
// sidecar tuning the same tracker at the same moment makes this one skip it.
func TuneStored(ctx context.Context, pool *pgxpool.Pool, trackerID int) (applied bool, err error) {
	ts, err := LoadTrackers(ctx, pool)
	if err != nil {
		return false, err
	}
	t := ts[trackerID]
	if t == nil {
		return false, fmt.Errorf("tracker %d: %w", trackerID, ErrNoSeries)
	}
	conn, err := pool.Acquire(ctx)
	if err != nil {
		return false, fmt.Errorf("tune tracker %q: %w", t.Name, err)
	}
	defer conn.Release()
	var got bool
	if err := conn.QueryRow(ctx, `SELECT pg_try_advisory_lock($1, $2)`, int32(tuneLockKey), int32(trackerID)).Scan(&got); err != nil {
		return false, fmt.Errorf("tune tracker %q: %w", t.Name, err)
	}
	if !got {
		return false, nil
	}
	defer conn.Exec(context.WithoutCancel(ctx), `SELECT pg_advisory_unlock($1, $2)`, int32(tuneLockKey), int32(trackerID))

	var auto bool
	if err := pool.QueryRow(ctx, `SELECT lambda IS NULL OR auto_tune FROM sidetrend.trackers WHERE id = $1`, trackerID).Scan(&auto); err != nil {
		return false, fmt.Errorf("tune tracker %q: %w", t.Name, err)
	}
	tr, err := tuneTracker(ctx, pool, t, true, estimator.SearchOptions{}, nil)
	if err != nil {
		return false, err
	}
	r := tr.tracker
	apply := applyNone
	if auto && !math.IsNaN(r.Lambda) && (t.LambdaAuto || r.RMSEAfter < r.RMSEBefore*(1-autoApplyGain)) {
		apply = applyTracker
	}
	if err := storeTuning(ctx, pool, t, tr, true, apply, false); err != nil {
		return false, err
	}
	return apply != applyNone, nil
}

// TunePending runs TuneStored for every active, backfilled tracker that
// asks for it: one with a row in sidetrend.tune_requests; and one that
// chooses its own lambda (lambda => NULL or auto_tune) whose ready series
// have never been tuned (right after its backfill) or were too short to
// score last time and have grown since, or, when maxAge > 0, whose results
// are older than maxAge. It returns how many trackers it tuned and
// whether it applied a lambda anywhere (those series wait for a replay).
func TunePending(ctx context.Context, pool *pgxpool.Pool, maxAge time.Duration, log *slog.Logger) (tuned int, applied bool, err error) {
	if log == nil {
		log = slog.New(slog.DiscardHandler)
	}
	rows, err := pool.Query(ctx, tunePendingSQL, maxAge.Seconds())
	if err != nil {
		return 0, false, fmt.Errorf("find trackers to tune: %w", err)
	}
	ids, err := pgx.CollectRows(rows, pgx.RowTo[int32])
	if err != nil {
		return 0, false, fmt.Errorf("find trackers to tune: %w", err)
	}
	for _, id := range ids {
		start := time.Now()
		a, err := TuneStored(ctx, pool, int(id))
		if err != nil {
			return tuned, applied, err
		}
		tuned++
		applied = applied || a
		log.Info("tracker tuned", "tracker_id", id, "applied", a, "took_ms", time.Since(start).Milliseconds())
	}
	return tuned, applied, nil
}

// tunePendingSQL: a lambda search over every series costs seconds to
// minutes of CPU for a large tracker, so the sidecar runs it by itself only
// for trackers that choose their own lambda (lambda => NULL, auto_tune) and
// for explicit requests (sidetrend.request_tune, `sidetrend tune`).
const tunePendingSQL = `
SELECT t.id FROM sidetrend.trackers t
LEFT JOIN sidetrend.tuning g ON g.tracker_id = t.id AND g.scope = 'tracker' AND g.series_key = ''
WHERE t.status = 'active' AND t.backfilled
  AND NOT EXISTS (SELECT 1 FROM sidetrend.series s WHERE s.tracker_id = t.id AND s.rebuild)
  AND (EXISTS (SELECT 1 FROM sidetrend.tune_requests r WHERE r.tracker_id = t.id)
       OR ((t.lambda IS NULL OR t.auto_tune) AND (
              (g.tracker_id IS NULL AND EXISTS (SELECT 1 FROM sidetrend.series s WHERE s.tracker_id = t.id AND s.ready))
           OR (g.lambda IS NULL AND (SELECT sum(s.points) FROM sidetrend.series s WHERE s.tracker_id = t.id) > g.points)
           OR ($1::float8 > 0 AND g.computed_at < now() - make_interval(secs => $1::float8)))))
ORDER BY t.id`

// trackerTuning is everything tuneTracker found for one tracker.
type trackerTuning struct {
	tracker TuneResult
	series  []TuneResult
}

// tuneTracker loads every folded series of t and runs the searches.
func tuneTracker(ctx context.Context, pool *pgxpool.Pool, t *Tracker, perSeries bool, opt estimator.SearchOptions, prog Progress) (*trackerTuning, error) {
	rows, err := pool.Query(ctx, `SELECT series_key FROM sidetrend.series
		WHERE tracker_id = $1 AND folded_through IS NOT NULL ORDER BY series_key`, int32(t.ID))
	if err != nil {
		return nil, fmt.Errorf("tune tracker %q: list series: %w", t.Name, err)
	}
	keys, err := pgx.CollectRows(rows, pgx.RowTo[string])
	if err != nil {
		return nil, fmt.Errorf("tune tracker %q: list series: %w", t.Name, err)
	}
	cands := candidates(t.Spec)
	if prog != nil {
		total := int64(len(keys) + len(cands))
		if perSeries {
			total += int64(len(keys))
		}
		prog.Start("tuning "+t.Name, total)
		defer prog.Done()
	}
	data := make([]*SeriesData, 0, len(keys))
	for _, k := range keys {
		d, err := LoadSeries(ctx, pool, t.Name, k)
		if errors.Is(err, ErrNoSeries) {
			continue // untracked or emptied meanwhile
		}
		if err != nil {
			return nil, err
		}
		if len(d.Values) > 0 {
			data = append(data, d)
		}
		if prog != nil {
			prog.Add(1)
		}
	}
	out := &trackerTuning{}
	all := make([][]float64, len(data))
	for i, d := range data {
		all[i] = d.Values
	}

	// Tracker-wide: before at each series' lambda in use, after at one
	// lambda for all; the simpler and richer models get their own search.
	tr := TuneResult{Tracker: t.Name, Series: len(data), LambdaBefore: t.Spec.Lambda, Best: -1}
	var sse float64
	var n int64
	for _, d := range data {
		s, k, err := estimator.Objective(d.Spec, [][]float64{d.Values})
		if err != nil {
			return nil, fmt.Errorf("tune tracker %q series %q: %w", t.Name, d.Key, err)
		}
		sse, n = sse+s, n+k
		tr.Points += observed(d.Values)
	}
	tr.RMSEBefore = rmse(sse, n)
	searches := make([]estimator.SearchResult, len(cands))
	errs := make([]error, len(cands))
	parallel(len(cands), func(i int) {
		searches[i], errs[i] = estimator.SearchLambda(cands[i], all, opt)
		if prog != nil {
			prog.Add(1)
		}
	})
	if err := errs[0]; err != nil && !errors.Is(err, estimator.ErrNoErrors) {
		return nil, fmt.Errorf("tune tracker %q: %w", t.Name, err)
	}
	fillResult(&tr, searches[0], errs[0])
	tr.Curve = searches[0].Curve
	if errs[0] == nil {
		tr.Models, tr.Best = compareModels(cands, searches, errs, all)
	}
	out.tracker = tr

	if perSeries {
		out.series = make([]TuneResult, len(data))
		perr := make([]error, len(data))
		parallel(len(data), func(i int) {
			d := data[i]
			key := d.Key
			r := TuneResult{Tracker: t.Name, SeriesKey: &key, Series: 1, Points: observed(d.Values),
				LambdaBefore: d.Spec.Lambda, Best: -1}
			s, k, err := estimator.Objective(d.Spec, [][]float64{d.Values})
			if err != nil {
				perr[i] = fmt.Errorf("tune tracker %q series %q: %w", t.Name, d.Key, err)
				return
			}
			r.RMSEBefore = rmse(s, k)
			res, err := estimator.SearchLambda(d.Spec, [][]float64{d.Values}, opt)
			if err != nil && !errors.Is(err, estimator.ErrNoErrors) {
				perr[i] = fmt.Errorf("tune tracker %q series %q: %w", t.Name, d.Key, err)
				return
			}
			fillResult(&r, res, err)
			out.series[i] = r
			if prog != nil {
				prog.Add(1)
			}
		})
		if err := errors.Join(perr...); err != nil {
			return nil, err
		}
	}
	return out, nil
}

func fillResult(r *TuneResult, res estimator.SearchResult, err error) {
	if err != nil {
		r.Lambda, r.MemoryBuckets, r.RMSEAfter = math.NaN(), math.NaN(), math.NaN()
		r.Note = "too short: no one-step error after the parameters plus burn-in"
		return
	}
	r.Lambda, r.N = res.Lambda, res.N
	r.MemoryBuckets = 1 / (1 - res.Lambda)
	r.RMSEAfter = math.Sqrt(res.MSE)
}

func rmse(sse float64, n int64) float64 {
	if n == 0 {
		return math.NaN()
	}
	return math.Sqrt(sse / float64(n))
}

func observed(ys []float64) int64 {
	var n int64
	for _, y := range ys {
		if !math.IsNaN(y) {
			n++
		}
	}
	return n
}

// candidates returns the tracker's model first, then one simpler and one
// richer model where they exist: the polynomial degree one lower and one
// higher with the same season; where the degree is at its limit (0 below,
// estimator.MaxDegree above), one harmonic fewer or more instead (fewer
// than one harmonic means no season).
func candidates(s estimator.Spec) []estimator.Spec {
	out := []estimator.Spec{s}
	simpler, richer := s, s
	switch {
	case s.Degree > 0:
		simpler.Degree--
		out = append(out, simpler)
	case s.Harmonics > 1:
		simpler.Harmonics--
		out = append(out, simpler)
	case s.Harmonics == 1:
		simpler.Harmonics, simpler.Period = 0, 0
		out = append(out, simpler)
	}
	switch {
	case s.Degree < estimator.MaxDegree:
		richer.Degree++
		out = append(out, richer)
	case s.Period > 0:
		richer.Harmonics++
		if richer.Validate() == nil {
			out = append(out, richer)
		}
	}
	return out
}

// compareModels scores every candidate at its own best lambda on the
// buckets where all of them scored a one-step error (a richer model has more
// parameters and starts scoring later), so that the counts match.
func compareModels(cands []estimator.Spec, searches []estimator.SearchResult, errs []error, series [][]float64) ([]ModelScore, int) {
	var specs []estimator.Spec
	var models []ModelScore
	for i, c := range cands {
		if errs[i] != nil {
			continue
		}
		c.Lambda = searches[i].Lambda
		specs = append(specs, c)
		models = append(models, ModelScore{Degree: c.Degree, Period: c.Period, Harmonics: c.Harmonics,
			Lambda: c.Lambda, Current: i == 0})
	}
	sse := make([]float64, len(specs))
	var n int64
	step := make([]float64, len(specs))
	states := make([]*estimator.State, len(specs))
	for _, ys := range series {
		for i, sp := range specs {
			states[i], _ = estimator.NewState(sp) // validated by the search
		}
		for _, y := range ys {
			all := true
			for i, st := range states {
				if math.IsNaN(y) {
					st.Skip(1)
					all = false
					continue
				}
				s, err := st.Observe(y)
				if err != nil {
					// As the drain does: a value that cannot be folded in
					// is a bucket without a value.
					st.Skip(1)
				}
				if err != nil || !s.Scored {
					all = false
				}
				step[i] = s.Err
			}
			if !all {
				continue
			}
			n++
			for i := range specs {
				sse[i] += step[i] * step[i]
			}
		}
	}
	best := -1
	for i := range models {
		models[i].N = n
		models[i].RMSE = rmse(sse[i], n)
		// The current model keeps the lead on a tie: it is listed first.
		if n > 0 && (best < 0 || models[i].RMSE < models[best].RMSE) {
			best = i
		}
	}
	return models, best
}

// parallel runs fn(0..n-1) on as many goroutines as there are CPUs.
func parallel(n int, fn func(i int)) {
	workers := min(runtime.GOMAXPROCS(0), n)
	var wg sync.WaitGroup
	next := make(chan int)
	for w := 0; w < workers; w++ {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for i := range next {
				fn(i)
			}
		}()
	}
	for i := 0; i < n; i++ {
		next <- i
	}
	close(next)
	wg.Wait()
}

const deleteTuningSQL = `DELETE FROM sidetrend.tuning WHERE tracker_id = $1 AND scope = $2`

const insertTuningSQL = `
INSERT INTO sidetrend.tuning (tracker_id, scope, series_key, lambda_before, lambda, memory_buckets,
    rmse_before, rmse_after, n_errors, series_count, points, curve_lambda, curve_rmse,
    degree, harmonics, models, best_degree, best_harmonics, note, applied_at)
VALUES ($1, $2, $3, $4, $5, $6, $7, $8, $9, $10, $11, $12, $13, $14, $15, $16, $17, $18, $19,
        CASE WHEN $20::bool THEN now() END)`

// What storeTuning applies.
const (
	applyNone    = iota
	applyTracker // the tracker-wide lambda
	applySeries  // each series' own lambda
)

// storeTuning replaces the stored results (tracker-wide, and per series when
// withSeries) and applies what apply says, all in one transaction: a
// tracker-wide lambda goes to trackers.lambda and clears the series' own
// lambdas (the RMSE after was measured with one lambda for all), per-series
// lambdas go to series.lambda; every affected series is marked for replay.
// switchModel also stores the winning degree and harmonics with that
// model's lambda.
func storeTuning(ctx context.Context, pool *pgxpool.Pool, t *Tracker, tr *trackerTuning, withSeries bool, apply int, switchModel bool) error {
	tx, err := pool.Begin(ctx)
	if err != nil {
		return fmt.Errorf("store tuning of %q: %w", t.Name, err)
	}
	defer tx.Rollback(context.WithoutCancel(ctx))
	b := &pgx.Batch{}
	r := &tr.tracker
	toTracker := apply == applyTracker && !math.IsNaN(r.Lambda)
	toSeries := apply == applySeries && withSeries
	b.Queue(deleteTuningSQL, int32(t.ID), "tracker")
	b.Queue(insertTuningSQL, tuningArgs(t, r, "tracker", toTracker)...)
	if withSeries {
		b.Queue(deleteTuningSQL, int32(t.ID), "series")
		for i := range tr.series {
			s := &tr.series[i]
			b.Queue(insertTuningSQL, tuningArgs(t, s, "series", toSeries && !math.IsNaN(s.Lambda))...)
		}
	}
	switch {
	case toTracker:
		lambda, degree, harmonics, period := r.Lambda, t.Spec.Degree, t.Spec.Harmonics, t.Spec.Period
		if switchModel && r.Best > 0 {
			m := r.Models[r.Best]
			lambda, degree, harmonics, period = m.Lambda, m.Degree, m.Harmonics, m.Period
			r.ModelSwitched = true
		}
		var p *float64 // no season: NULL, as sidetrend.track() stores it
		if period > 0 {
			p = &period
		}
		b.Queue(`UPDATE sidetrend.trackers SET lambda = $2, auto_tune = auto_tune OR lambda IS NULL,
			degree = $3, harmonics = $4, period = $5 WHERE id = $1`,
			int32(t.ID), lambda, degree, harmonics, p)
		b.Queue(`UPDATE sidetrend.series SET lambda = NULL, rebuild = true WHERE tracker_id = $1`, int32(t.ID))
		r.Applied = true
	case toSeries:
		keys, lambdas := []string{}, []float64{}
		for i := range tr.series {
			s := &tr.series[i]
			if !math.IsNaN(s.Lambda) {
				keys, lambdas = append(keys, *s.SeriesKey), append(lambdas, s.Lambda)
				s.Applied = true
			}
		}
		b.Queue(`UPDATE sidetrend.series s SET lambda = q.lambda, rebuild = true
			FROM unnest($2::text[], $3::float8[]) AS q(key, lambda)
			WHERE s.tracker_id = $1 AND s.series_key = q.key`, int32(t.ID), keys, lambdas)
	}
	b.Queue(`DELETE FROM sidetrend.tune_requests WHERE tracker_id = $1`, int32(t.ID))
	if r.Applied || toSeries {
		// Wake the sidecar: it replays the series marked for rebuild.
		b.Queue(`SELECT pg_notify($1, $2)`, Channel, fmt.Sprint(t.ID))
	}
	if err := tx.SendBatch(ctx, b).Close(); err != nil {
		return fmt.Errorf("store tuning of %q: %w", t.Name, err)
	}
	if err := tx.Commit(ctx); err != nil {
		return fmt.Errorf("store tuning of %q: %w", t.Name, err)
	}
	return nil
}

func tuningArgs(t *Tracker, r *TuneResult, scope string, applied bool) []any {
	key := ""
	if r.SeriesKey != nil {
		key = *r.SeriesKey
	}
	var curveL, curveR []*float64
	for _, c := range r.Curve {
		curveL = append(curveL, nullable(c.Lambda))
		curveR = append(curveR, nullable(math.Sqrt(c.MSE)))
	}
	var models []byte
	var bestDegree, bestHarmonics *int
	if len(r.Models) > 0 {
		ms := make([]map[string]any, len(r.Models))
		for i, m := range r.Models {
			ms[i] = map[string]any{"degree": m.Degree, "period": m.Period, "harmonics": m.Harmonics,
				"lambda": nullable(m.Lambda), "rmse": nullable(m.RMSE), "n": m.N, "current": m.Current}
		}
		models, _ = json.Marshal(ms)
		if r.Best >= 0 {
			bestDegree, bestHarmonics = &r.Models[r.Best].Degree, &r.Models[r.Best].Harmonics
		}
	}
	var note *string
	if r.Note != "" {
		note = &r.Note
	}
	return []any{int32(t.ID), scope, key, nullable(r.LambdaBefore), nullable(r.Lambda), nullable(r.MemoryBuckets),
		nullable(r.RMSEBefore), nullable(r.RMSEAfter), r.N, int32(r.Series), r.Points, curveL, curveR,
		int32(t.Spec.Degree), int32(t.Spec.Harmonics), models, bestDegree, bestHarmonics, note, applied}
}

func sortedIDs(ts map[int]*Tracker) []int {
	ids := make([]int, 0, len(ts))
	for id := range ts {
		ids = append(ids, id)
	}
	sort.Ints(ids)
	return ids
}
