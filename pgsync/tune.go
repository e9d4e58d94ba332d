package pgsync

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"log/slog"
	"math"
	"runtime"
	"slices"
	"sort"
	"strings"
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
	Degree       int     `json:"degree"`
	Period       float64 `json:"period"`
	Harmonics    int     `json:"harmonics"`
	Lambda       float64 `json:"lambda"`
	SeasonLambda float64 `json:"season_lambda"` // 0: the same as Lambda
	RMSE         float64 `json:"rmse"`
	N            int64   `json:"n"`
	Current      bool    `json:"current"`
}

// TuneResult is the lambda search of one tracker (SeriesKey nil: all its
// series together) or of one series.
type TuneResult struct {
	Tracker   string
	SeriesKey *string
	Series    int   // series the result covers
	Points    int64 // bucket values they hold (gaps excluded)
	// LambdaBefore is the lambda in use: the tracker's, or the series' own;
	// SeasonLambdaBefore the seasonal factor in use (0: the same).
	LambdaBefore, SeasonLambdaBefore float64
	// Lambda and SeasonLambda (0: the same) are the factors the search
	// chose for the model's degree and harmonics, MemoryBuckets the
	// effective memory 1/(1 - lambda) in buckets; NaN when nothing could
	// be scored.
	Lambda, SeasonLambda, MemoryBuckets float64
	// RMSEBefore and RMSEAfter are sqrt(mean squared one-step error) of
	// the model in use and of the chosen one, over the same buckets: each
	// series' buckets after its first Warmup, every forecast made from the
	// buckets before it only (estimator.Choose).
	RMSEBefore, RMSEAfter float64
	N                     int64 // one-step errors scored
	Warmup                int   // leading buckets of each series not scored
	// AtBound names each chosen setting that sits on the edge of the
	// range searched (estimator.Choice.AtBound).
	AtBound []string
	// ModelBefore and Model describe the model in use and the chosen one
	// (estimator.ModelText); empty when nothing was scored.
	ModelBefore, Model string

	// Tracker-wide results only: the model comparison, the best factors of
	// every degree (0 to 2) and number of harmonics (0 to 6 with a
	// period), scored like RMSEAfter (Models[Best] has the smallest RMSE;
	// -1 when none scored). The entry of the current degree and harmonics
	// is the chosen model, with the same RMSE as RMSEAfter.
	Curve  []estimator.CurvePoint // not filled since model choice on held-out errors
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
		tr, err := tuneTracker(ctx, pool, t, o.PerSeries, o.Search, o.Progress, false)
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
	tr, err := tuneTracker(ctx, pool, t, true, estimator.SearchOptions{}, nil, true)
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
//
// background is the sidecar's own tuning, which shares the machine with
// the drain: the tracker-wide search then pools a sample of at most
// backgroundSample series spread over the keys, per-series results are
// computed only for trackers of at most backgroundPerSeries series, and
// one goroutine does them. (Unbounded, the search over every series of a
// 10,000-series tracker took both cores for minutes, and a live stream of
// 20,000 rows/s fell 13 s behind where it kept within 0.3 s without it:
// BenchmarkStream, measured.) `sidetrend tune` searches every series.
func tuneTracker(ctx context.Context, pool *pgxpool.Pool, t *Tracker, perSeries bool, opt estimator.SearchOptions, prog Progress, background bool) (*trackerTuning, error) {
	rows, err := pool.Query(ctx, `SELECT series_key FROM sidetrend.series
		WHERE tracker_id = $1 AND folded_through IS NOT NULL ORDER BY series_key`, int32(t.ID))
	if err != nil {
		return nil, fmt.Errorf("tune tracker %q: list series: %w", t.Name, err)
	}
	keys, err := pgx.CollectRows(rows, pgx.RowTo[string])
	if err != nil {
		return nil, fmt.Errorf("tune tracker %q: list series: %w", t.Name, err)
	}
	workers := 0 // every core
	if background {
		workers = 1
		if len(keys) > backgroundPerSeries {
			perSeries = false
		}
		if !perSeries {
			keys = spread(keys, backgroundSample)
		}
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
	specs := make([]estimator.Spec, len(data))
	for i, d := range data {
		all[i], specs[i] = t.FitValues(d.WithoutPartialStart()), d.Spec
	}
	// The tracker-wide search pools every series, or in the background a
	// spread sample of them.
	pooledAll, pooledSpecs := all, specs
	if background && len(data) > backgroundSample {
		idx := spread(indexes(len(data)), backgroundSample)
		pooledAll, pooledSpecs = make([][]float64, len(idx)), make([]estimator.Spec, len(idx))
		for j, i := range idx {
			pooledAll[j], pooledSpecs[j] = all[i], specs[i]
		}
	}
	grid := estimator.ChoiceGrid()
	if opt != (estimator.SearchOptions{}) {
		if grid, err = estimator.LambdaGrid(opt); err != nil {
			return nil, err
		}
	}
	// The factors in use are candidates too: a choice is never worse than
	// them on the buckets it is scored on.
	trendGrid := append(slices.Clone(grid), t.Spec.Lambda)
	seasonGrid := append(slices.Clone(grid), t.Spec.SeasonFactor())

	// Tracker-wide: every degree and number of harmonics with their best
	// factors over all series together, then the current degree and
	// harmonics on their own (the same search restricted: the same result
	// as its entry among the models), and the models in use, all scored on
	// the same buckets.
	tr := TuneResult{Tracker: t.Name, Series: len(pooledAll), LambdaBefore: t.Spec.Lambda,
		SeasonLambdaBefore: t.Spec.Canonical().SeasonLambda, Best: -1}
	for _, ys := range pooledAll {
		tr.Points += observed(ys)
	}
	free := estimator.ChooseOptions{Period: t.Spec.Period, BurnIn: t.Spec.BurnIn, Lambdas: trendGrid, SeasonLambdas: seasonGrid}
	if t.Spec.Period == 0 {
		free.Harmonics = []int{0}
	}
	all3, err := estimator.Choose(pooledAll, free)
	if prog != nil {
		prog.Add(int64(len(cands)))
	}
	switch {
	case errors.Is(err, estimator.ErrNoErrors):
		noErrors(&tr)
	case err != nil:
		return nil, fmt.Errorf("tune tracker %q: %w", t.Name, err)
	default:
		fixed := free
		fixed.Degrees, fixed.Harmonics, fixed.Warmup = []int{t.Spec.Degree}, []int{t.Spec.Harmonics}, all3.Warmup
		ch, err := estimator.Choose(pooledAll, fixed)
		if errors.Is(err, estimator.ErrNoErrors) {
			noErrors(&tr)
			break
		}
		if err != nil {
			return nil, fmt.Errorf("tune tracker %q: %w", t.Name, err)
		}
		before, err := estimator.Pooled(pooledSpecs, pooledAll, all3.Warmup)
		if err != nil {
			return nil, fmt.Errorf("tune tracker %q: %w", t.Name, err)
		}
		fillChoice(&tr, ch, before, t.Spec)
		for _, c := range all3.Tried {
			tr.Models = append(tr.Models, ModelScore{Degree: c.Spec.Degree, Period: c.Spec.Period, Harmonics: c.Spec.Harmonics,
				Lambda: c.Spec.Lambda, SeasonLambda: c.Spec.SeasonLambda, RMSE: c.Score.RMSE, N: c.Score.N,
				Current: c.Spec.Degree == t.Spec.Degree && c.Spec.Harmonics == t.Spec.Harmonics})
		}
		tr.Best = 0 // Tried is sorted, best first
	}
	out.tracker = tr

	if perSeries {
		// Per series: the trend factor of the tracker's model for each
		// series on its own; the seasonal factor stays the tracker's
		// (series store only their own lambda).
		season := []float64{0}
		if sl := t.Spec.Canonical().SeasonLambda; sl != 0 {
			season = []float64{sl}
		}
		out.series = make([]TuneResult, len(data))
		perr := make([]error, len(data))
		parallel(len(data), workers, func(i int) {
			d := data[i]
			key := d.Key
			r := TuneResult{Tracker: t.Name, SeriesKey: &key, Series: 1, Points: observed(d.Values),
				LambdaBefore: d.Spec.Lambda, SeasonLambdaBefore: d.Spec.Canonical().SeasonLambda, Best: -1}
			o := estimator.ChooseOptions{Period: t.Spec.Period, BurnIn: t.Spec.BurnIn, Degrees: []int{t.Spec.Degree},
				Harmonics: []int{t.Spec.Harmonics}, Lambdas: append(slices.Clone(grid), d.Spec.Lambda), SeasonLambdas: season}
			ys := all[i]
			ch, err := estimator.Choose([][]float64{ys}, o)
			switch {
			case errors.Is(err, estimator.ErrNoErrors):
				noErrors(&r)
			case err != nil:
				perr[i] = fmt.Errorf("tune tracker %q series %q: %w", t.Name, d.Key, err)
				return
			default:
				before, err := estimator.Pooled([]estimator.Spec{d.Spec}, [][]float64{ys}, ch.Warmup)
				if err != nil {
					perr[i] = fmt.Errorf("tune tracker %q series %q: %w", t.Name, d.Key, err)
					return
				}
				fillChoice(&r, ch, before, d.Spec)
			}
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

// noErrors marks a result without any scored one-step error.
func noErrors(r *TuneResult) {
	r.Lambda, r.SeasonLambda, r.MemoryBuckets, r.RMSEAfter, r.RMSEBefore = math.NaN(), math.NaN(), math.NaN(), math.NaN(), math.NaN()
	r.Note = "too short: no one-step error after the warm-up, the parameters and the burn-in"
}

func optText(s string) *string {
	if s == "" {
		return nil
	}
	return &s
}

// fillChoice records a choice and the score of the model in use, both
// over the same buckets.
func fillChoice(r *TuneResult, ch estimator.Choice, before estimator.Score, inUse estimator.Spec) {
	r.Model, r.ModelBefore = estimator.ModelText(ch.Spec), estimator.ModelText(inUse)
	r.Lambda, r.SeasonLambda, r.N, r.Warmup, r.AtBound = ch.Spec.Lambda, ch.Spec.SeasonLambda, ch.Score.N, ch.Warmup, ch.AtBound
	r.MemoryBuckets = 1 / (1 - ch.Spec.Lambda)
	r.RMSEAfter, r.RMSEBefore = ch.Score.RMSE, before.RMSE
	if math.IsInf(r.RMSEBefore, 1) {
		r.RMSEBefore = math.NaN()
	}
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

// candidates is the tracker's model; the comparison of degrees and
// harmonics is estimator.Choose's (used for the progress count).
func candidates(s estimator.Spec) []estimator.Spec { return []estimator.Spec{s} }

// parallel runs fn(0..n-1) on as many goroutines as there are CPUs.
// parallel runs fn(0..n-1) on workers goroutines (0: one per core).
func parallel(n, workers int, fn func(i int)) {
	if workers <= 0 {
		workers = runtime.GOMAXPROCS(0)
	}
	workers = min(workers, n)
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
    degree, harmonics, models, best_degree, best_harmonics, note, applied_at,
    season_lambda_before, season_lambda, at_bound, model_before, model)
VALUES ($1, $2, $3, $4, $5, $6, $7, $8, $9, $10, $11, $12, $13, $14, $15, $16, $17, $18, $19,
        CASE WHEN $20::bool THEN now() END, $21, $22, $23, $24, $25)`

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
		lambda, season, degree, harmonics, period := r.Lambda, r.SeasonLambda, t.Spec.Degree, t.Spec.Harmonics, t.Spec.Period
		if switchModel && r.Best >= 0 && !r.Models[r.Best].Current {
			m := r.Models[r.Best]
			lambda, season, degree, harmonics = m.Lambda, m.SeasonLambda, m.Degree, m.Harmonics
			if harmonics > 0 {
				period = m.Period
			}
			r.ModelSwitched = true
		}
		var p *float64 // no season: NULL, as sidetrend.track() stores it
		if period > 0 {
			p = &period
		}
		var sl *float64 // one factor: NULL
		if season != 0 && !math.IsNaN(season) {
			sl = &season
		}
		b.Queue(`UPDATE sidetrend.trackers SET lambda = $2, auto_tune = auto_tune OR lambda IS NULL,
			degree = $3, harmonics = $4, period = $5, season_lambda = $6 WHERE id = $1`,
			int32(t.ID), lambda, degree, harmonics, p, sl)
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
				"lambda": nullable(m.Lambda), "season_lambda": nullable(m.SeasonLambda), "rmse": nullable(m.RMSE), "n": m.N, "current": m.Current}
		}
		models, _ = json.Marshal(ms)
		if r.Best >= 0 {
			bestDegree, bestHarmonics = &r.Models[r.Best].Degree, &r.Models[r.Best].Harmonics
		}
	}
	var note, atBound *string
	if r.Note != "" {
		note = &r.Note
	}
	if len(r.AtBound) > 0 {
		s := strings.Join(r.AtBound, "; ")
		atBound = &s
	}
	// A seasonal factor of 0 is "the same as lambda": NULL.
	nz := func(x float64) *float64 {
		if x == 0 {
			return nil
		}
		return nullable(x)
	}
	return []any{int32(t.ID), scope, key, nullable(r.LambdaBefore), nullable(r.Lambda), nullable(r.MemoryBuckets),
		nullable(r.RMSEBefore), nullable(r.RMSEAfter), r.N, int32(r.Series), r.Points, curveL, curveR,
		int32(t.Spec.Degree), int32(t.Spec.Harmonics), models, bestDegree, bestHarmonics, note, applied,
		nz(r.SeasonLambdaBefore), nz(r.SeasonLambda), atBound, optText(r.ModelBefore), optText(r.Model)}
}

func sortedIDs(ts map[int]*Tracker) []int {
	ids := make([]int, 0, len(ts))
	for id := range ts {
		ids = append(ids, id)
	}
	sort.Ints(ids)
	return ids
}

// The sidecar's own tuning's bounds (see tuneTracker).
const (
	backgroundSample    = 500
	backgroundPerSeries = 2000
)

// spread returns at most n of xs, evenly spread over them in their order.
func spread[T any](xs []T, n int) []T {
	if len(xs) <= n {
		return xs
	}
	out := make([]T, n)
	for j := range out {
		out[j] = xs[j*len(xs)/n]
	}
	return out
}

func indexes(n int) []int {
	ix := make([]int, n)
	for i := range ix {
		ix[i] = i
	}
	return ix
}
