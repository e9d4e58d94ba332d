package pgsync

import (
	"context"
	"errors"
	"math"
	"math/rand/v2"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgconn"
	"github.com/jackc/pgx/v5/pgxpool"
	"gonum.org/v1/gonum/floats/scalar"

	"github.com/sidetrend/sidetrend/estimator"
)

// tunedSales makes the sales scenario of the pipeline tests, folded.
func tunedSales(t *testing.T, seed uint64) *pgxpool.Pool {
	t.Helper()
	pool, _ := newDB(t)
	createSales(t, pool, "sales")
	insertRows(t, pool, "sales", salesRows(rand.New(rand.NewPCG(seed, seed)), 3, 120, 2))
	if err := NewSyncer(pool, nil).CatchUp(context.Background()); err != nil {
		t.Fatal(err)
	}
	return pool
}

// TestTuneMatchesSearch checks Tune against the estimator's search and
// objective run on the daily sums worked out in Go, and that without
// Apply nothing but sidetrend.tuning changes.
func TestTuneMatchesSearch(t *testing.T) {
	t.Parallel()
	pool := tunedSales(t, 11)
	ctx := context.Background()
	var prog countingProgress
	res, err := Tune(ctx, pool, TuneOptions{Tracker: "sales", PerSeries: true, Progress: &prog})
	if err != nil {
		t.Fatal(err)
	}
	series := dailySums(t, pool, "sales")
	keys := sortedKeys(series)
	if len(res) != 1+len(keys) || res[0].SeriesKey != nil {
		t.Fatalf("%d results (first key %v), want the tracker-wide one then %d series", len(res), res[0].SeriesKey, len(keys))
	}
	var all [][]float64
	for _, k := range keys {
		all = append(all, series[k].ys)
	}
	// The same model choice run on the daily sums worked out in Go
	// (estimator.Choose, the tracker's degree and harmonics fixed, the
	// warm-up of the full comparison; the factors in use among the
	// candidates) and the models in use scored on the same buckets
	// (estimator.Pooled). RMSE relative 1e-6: the sums in the database are
	// added in another order, which moves the errors in their last digits.
	grid := estimator.ChoiceGrid()
	free, err := estimator.Choose(all, estimator.ChooseOptions{Period: 7,
		Lambdas: append(slices.Clone(grid), 0.95), SeasonLambdas: append(slices.Clone(grid), 0.95)})
	if err != nil {
		t.Fatal(err)
	}
	check := func(name string, r TuneResult, ys [][]float64, o estimator.ChooseOptions) {
		t.Helper()
		o.Period, o.Degrees, o.Harmonics = 7, []int{1}, []int{2}
		want, err := estimator.Choose(ys, o)
		if err != nil {
			t.Fatal(err)
		}
		specs := make([]estimator.Spec, len(ys))
		for i := range specs {
			specs[i] = salesSpec
		}
		before, err := estimator.Pooled(specs, ys, want.Warmup)
		if err != nil {
			t.Fatal(err)
		}
		if r.Lambda != want.Spec.Lambda || r.SeasonLambda != want.Spec.SeasonLambda || !scalar.EqualWithinRel(r.RMSEAfter, want.Score.RMSE, 1e-6) ||
			r.N != want.Score.N || r.Warmup != want.Warmup {
			t.Errorf("%s: %v %v rmse %v n %d warm-up %d, want %v rmse %v n %d warm-up %d", name, r.Lambda, r.SeasonLambda, r.RMSEAfter, r.N, r.Warmup,
				want.Spec, want.Score.RMSE, want.Score.N, want.Warmup)
		}
		if !scalar.EqualWithinRel(r.RMSEBefore, before.RMSE, 1e-6) || r.LambdaBefore != salesSpec.Lambda {
			t.Errorf("%s: before lambda %v rmse %v, want %v and %v", name, r.LambdaBefore, r.RMSEBefore, salesSpec.Lambda, before.RMSE)
		}
		if !scalar.EqualWithinRel(r.MemoryBuckets, 1/(1-r.Lambda), 1e-12) {
			t.Errorf("%s: memory %v, want 1/(1 - %v)", name, r.MemoryBuckets, r.Lambda)
		}
		if r.RMSEAfter > r.RMSEBefore*(1+1e-9) {
			t.Errorf("%s: tuned rmse %v is worse than before %v", name, r.RMSEAfter, r.RMSEBefore)
		}
	}
	check("tracker-wide", res[0], all, estimator.ChooseOptions{Warmup: free.Warmup,
		Lambdas: append(slices.Clone(grid), 0.95), SeasonLambdas: append(slices.Clone(grid), 0.95)})
	for i, k := range keys {
		if res[1+i].SeriesKey == nil || *res[1+i].SeriesKey != k {
			t.Fatalf("result %d is for %v, want %q", 1+i, res[1+i].SeriesKey, k)
		}
		check("series "+k, res[1+i], [][]float64{series[k].ys}, estimator.ChooseOptions{
			Lambdas: append(slices.Clone(grid), 0.95), SeasonLambdas: []float64{0}})
	}

	// Models: every degree 0 to 2 with 0 to 3 harmonics of the weekly
	// period, best first, on the same count of errors; the entry of the
	// current degree and harmonics is the tuned model with the same RMSE.
	ms := res[0].Models
	if len(ms) != 12 || res[0].Best != 0 {
		t.Fatalf("models %+v best %d: want 12, the best first", ms, res[0].Best)
	}
	current := 0
	for _, m := range ms {
		if m.N != ms[0].N || m.N == 0 || m.RMSE < ms[0].RMSE {
			t.Errorf("model %+v: want N %d and an RMSE at least the best's %v", m, ms[0].N, ms[0].RMSE)
		}
		if m.Current {
			current++
			if m.Degree != 1 || m.Harmonics != 2 || m.RMSE != res[0].RMSEAfter || m.Lambda != res[0].Lambda {
				t.Errorf("current model %+v: want degree 1, 2 harmonics, lambda %v and rmse %v", m, res[0].Lambda, res[0].RMSEAfter)
			}
		}
	}
	if current != 1 {
		t.Errorf("%d models marked current, want 1", current)
	}

	// Progress saw every series loaded and searched, and the comparison.
	if prog.total != int64(2*len(keys)+1) || prog.done != prog.total || !prog.finished {
		t.Errorf("progress %+v, want %d of %d and Done", prog, 2*len(keys)+1, 2*len(keys)+1)
	}

	// Nothing applied.
	var lambda float64
	var rebuilds, own int
	if err := pool.QueryRow(ctx, `SELECT t.lambda, count(*) FILTER (WHERE s.rebuild), count(s.lambda)
		FROM sidetrend.trackers t JOIN sidetrend.series s ON s.tracker_id = t.id GROUP BY t.lambda`).Scan(&lambda, &rebuilds, &own); err != nil {
		t.Fatal(err)
	}
	if lambda != 0.95 || rebuilds != 0 || own != 0 {
		t.Errorf("without Apply: tracker lambda %v, %d rebuilds, %d series lambdas; want 0.95, 0, 0", lambda, rebuilds, own)
	}
	// Stored for sidetrend.tune().
	var sqlLambda, sqlRMSE float64
	var sqlKey *string
	if err := pool.QueryRow(ctx, `SELECT series_key, lambda, rmse_after FROM sidetrend.tune('sales')`).Scan(&sqlKey, &sqlLambda, &sqlRMSE); err != nil {
		t.Fatal(err)
	}
	if sqlKey != nil || sqlLambda != res[0].Lambda || sqlRMSE != res[0].RMSEAfter {
		t.Errorf("tune('sales') = %v %v %v, want NULL %v %v", sqlKey, sqlLambda, sqlRMSE, res[0].Lambda, res[0].RMSEAfter)
	}
	var perSeries int
	if err := pool.QueryRow(ctx, `SELECT count(*) FROM sidetrend.tune('sales', per_series => true) WHERE series_key IS NOT NULL`).Scan(&perSeries); err != nil {
		t.Fatal(err)
	}
	if perSeries != len(keys) {
		t.Errorf("tune('sales', true) has %d rows, want %d", perSeries, len(keys))
	}
}

type countingProgress struct {
	total, done int64
	finished    bool
}

func (p *countingProgress) Start(_ string, total int64) {
	p.total, p.done, p.finished = total, 0, false
}
func (p *countingProgress) Add(n int64) { p.done += n }
func (p *countingProgress) Done()       { p.finished = true }

// TestTuneApply applies the tracker-wide lambda, then per-series ones, and
// checks after each replay that the forecasts are those of an offline fit
// with the new lambdas.
func TestTuneApply(t *testing.T) {
	t.Parallel()
	pool := tunedSales(t, 12)
	ctx := context.Background()
	res, err := Tune(ctx, pool, TuneOptions{Tracker: "sales", Apply: true})
	if err != nil {
		t.Fatal(err)
	}
	if len(res) != 1 || !res[0].Applied {
		t.Fatalf("results %+v: want one, applied", res)
	}
	var lambda float64
	var waiting int
	if err := pool.QueryRow(ctx, `SELECT t.lambda, count(*) FILTER (WHERE s.rebuild) FROM sidetrend.trackers t
		JOIN sidetrend.series s ON s.tracker_id = t.id GROUP BY t.lambda`).Scan(&lambda, &waiting); err != nil {
		t.Fatal(err)
	}
	if lambda != res[0].Lambda || waiting != res[0].Series {
		t.Fatalf("tracker lambda %v, %d series to replay; want %v and %d", lambda, waiting, res[0].Lambda, res[0].Series)
	}
	if err := NewSyncer(pool, nil).CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	spec := salesSpec
	spec.Lambda = res[0].Lambda
	compareForecasts(t, pool, "sales", offlineFit(t, pool, "sales", spec), 14)

	res, err = Tune(ctx, pool, TuneOptions{Tracker: "sales", PerSeries: true, Apply: true})
	if err != nil {
		t.Fatal(err)
	}
	if err := NewSyncer(pool, nil).CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	own := map[string]*estimator.State{}
	for _, r := range res[1:] {
		if !r.Applied {
			t.Errorf("series %q not applied", *r.SeriesKey)
		}
		spec := salesSpec
		spec.Lambda = r.Lambda
		own[*r.SeriesKey] = offlineFit(t, pool, "sales", spec)[*r.SeriesKey]
	}
	compareForecasts(t, pool, "sales", own, 14)
	var withOwn int
	if err := pool.QueryRow(ctx, `SELECT count(lambda) FROM sidetrend.series`).Scan(&withOwn); err != nil || withOwn != len(res)-1 {
		t.Errorf("%d series with their own lambda, want %d (err %v)", withOwn, len(res)-1, err)
	}

	if _, err := Tune(ctx, pool, TuneOptions{Tracker: "sales", PerSeries: true, Apply: true, Model: true}); err == nil ||
		!strings.Contains(err.Error(), "per tracker") {
		t.Errorf("per-series model switch: err %v, want one saying the model is per tracker", err)
	}
	if _, err := Tune(ctx, pool, TuneOptions{Tracker: "nosuch"}); err == nil || !strings.Contains(err.Error(), `no tracker named "nosuch"`) {
		t.Errorf("unknown tracker: err %v", err)
	}
}

// TestTuneModelSwitch tunes a local-mean tracker on orders that grow
// steadily: the linear trend must win the comparison, and Apply with Model
// switches the tracker to it.
func TestTuneModelSwitch(t *testing.T) {
	t.Parallel()
	pool, _ := newDB(t)
	ctx := context.Background()
	// A seed nursery's daily seedling orders: growing by 2 a day from 40,
	// noise sd 3 (invented).
	exec(t, pool, `CREATE TABLE orders (ordered_on date, qty int)`)
	exec(t, pool, `SELECT sidetrend.track('orders', 'ordered_on', 'qty', degree => 0, lambda => 0.9, horizon => 7)`)
	rng := rand.New(rand.NewPCG(13, 13))
	var rows [][]any
	for d := 0; d < 150; d++ {
		rows = append(rows, []any{time.Date(2026, 2, 1, 0, 0, 0, 0, time.UTC).AddDate(0, 0, d), int(math.Round(40 + 2*float64(d) + 3*rng.NormFloat64()))})
	}
	for _, r := range rows {
		exec(t, pool, `INSERT INTO orders VALUES ($1, $2)`, r...)
	}
	if err := NewSyncer(pool, nil).CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	res, err := Tune(ctx, pool, TuneOptions{Tracker: "orders", Apply: true, Model: true})
	if err != nil {
		t.Fatal(err)
	}
	r := res[0]
	if len(r.Models) != 3 || r.Best != 0 || r.Models[0].Degree != 1 || r.Models[0].Current || !r.ModelSwitched {
		t.Fatalf("models %+v best %d switched %v: want degrees 0 to 2, the linear trend best and switched to", r.Models, r.Best, r.ModelSwitched)
	}
	var degree int
	var lambda float64
	var period *float64
	if err := pool.QueryRow(ctx, `SELECT degree, lambda, period FROM sidetrend.trackers WHERE name = 'orders'`).Scan(&degree, &lambda, &period); err != nil {
		t.Fatal(err)
	}
	if degree != 1 || lambda != r.Models[0].Lambda || period != nil {
		t.Errorf("tracker now degree %d lambda %v period %v, want 1, %v, NULL", degree, lambda, period, r.Models[0].Lambda)
	}
	if err := NewSyncer(pool, nil).CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	var slope float64
	if err := pool.QueryRow(ctx, `SELECT slope FROM sidetrend.slopes WHERE tracker = 'orders'`).Scan(&slope); err != nil {
		t.Fatal(err)
	}
	// The data grow by 2 a day; a local linear fit with noise sd 3 lands
	// within a few tenths.
	if math.Abs(slope-2) > 0.5 {
		t.Errorf("slope after the switch %v, want about 2", slope)
	}
}

// TestTuneSQL checks sidetrend.tune(), request_tune() and the sidecar's
// stored tuning (TunePending): the error before any result, the results,
// and apply.
func TestTuneSQL(t *testing.T) {
	t.Parallel()
	pool := tunedSales(t, 14)
	ctx := context.Background()
	_, err := pool.Exec(ctx, `SELECT * FROM sidetrend.tune('sales')`)
	var pgErr *pgconn.PgError
	if !errors.As(err, &pgErr) || pgErr.SQLState() != "55000" ||
		!strings.Contains(pgErr.Message, `no tracker-wide tuning results yet for tracker "sales"`) ||
		!strings.Contains(pgErr.Hint, "sidetrend tune --tracker sales") || !strings.Contains(pgErr.Hint, "request_tune") {
		t.Fatalf("tune before results: %v (hint %q)", err, hint(err))
	}
	if _, err := pool.Exec(ctx, `SELECT * FROM sidetrend.tune('nosuch')`); !errors.As(err, &pgErr) || pgErr.SQLState() != "42704" {
		t.Errorf("tune of an unknown tracker: %v, want SQLSTATE 42704", err)
	}

	// The tracker has a fixed lambda: the sidecar does not spend a search on
	// it by itself, only when asked; it then stores results and applies
	// nothing.
	if tuned, _, err := TunePending(ctx, pool, 0, nil); err != nil || tuned != 0 {
		t.Fatalf("TunePending without a request: %d tuned (err %v), want 0 for a fixed lambda", tuned, err)
	}
	exec(t, pool, `SELECT sidetrend.request_tune('sales')`)
	tuned, applied, err := TunePending(ctx, pool, 0, nil)
	if err != nil || tuned != 1 || applied {
		t.Fatalf("TunePending after a request: %d tuned, applied %v, err %v; want 1, false", tuned, applied, err)
	}
	if tuned, _, err := TunePending(ctx, pool, 0, nil); err != nil || tuned != 0 {
		t.Errorf("TunePending again: %d tuned (err %v), want 0: results are stored", tuned, err)
	}
	var requests int
	if err := pool.QueryRow(ctx, `SELECT count(*) FROM sidetrend.tune_requests`).Scan(&requests); err != nil || requests != 0 {
		t.Errorf("%d requests left (err %v), want 0", requests, err)
	}
	rows, err := pool.Query(ctx, `SELECT series_key, lambda, memory_buckets, rmse_before, rmse_after FROM sidetrend.tune('sales', per_series => true)`)
	if err != nil {
		t.Fatal(err)
	}
	type row struct {
		key                      *string
		lambda, memory, bef, aft float64
	}
	got, err := pgx.CollectRows(rows, func(r pgx.CollectableRow) (row, error) {
		var x row
		err := r.Scan(&x.key, &x.lambda, &x.memory, &x.bef, &x.aft)
		return x, err
	})
	if err != nil {
		t.Fatal(err)
	}
	if len(got) != 3 {
		t.Fatalf("%d per-series rows, want 3", len(got))
	}
	for _, x := range got {
		if x.key == nil || !scalar.EqualWithinRel(x.memory, 1/(1-x.lambda), 1e-12) || x.aft > x.bef {
			t.Errorf("row %+v: want a key, memory 1/(1 - lambda), rmse after <= before", x)
		}
	}
	// Apply through SQL, per series.
	exec(t, pool, `SELECT * FROM sidetrend.tune('sales', per_series => true, apply => true)`)
	var set, waiting int
	if err := pool.QueryRow(ctx, `SELECT count(lambda), count(*) FILTER (WHERE rebuild) FROM sidetrend.series`).Scan(&set, &waiting); err != nil {
		t.Fatal(err)
	}
	if set != 3 || waiting != 3 {
		t.Errorf("after apply: %d series lambdas, %d to replay; want 3 and 3", set, waiting)
	}
	// And tracker-wide: one lambda for all, the series' own ones cleared.
	if err := NewSyncer(pool, nil).CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	var lambda float64
	if err := pool.QueryRow(ctx, `SELECT lambda FROM sidetrend.tune('sales', apply => true)`).Scan(&lambda); err != nil {
		t.Fatal(err)
	}
	var trackerLambda float64
	if err := pool.QueryRow(ctx, `SELECT t.lambda, count(s.lambda) FROM sidetrend.trackers t JOIN sidetrend.series s ON s.tracker_id = t.id
		GROUP BY t.lambda`).Scan(&trackerLambda, &set); err != nil {
		t.Fatal(err)
	}
	if trackerLambda != lambda || set != 0 {
		t.Errorf("after tracker-wide apply: tracker lambda %v, %d series lambdas; want %v and 0", trackerLambda, set, lambda)
	}
}

func hint(err error) string {
	var pgErr *pgconn.PgError
	if errors.As(err, &pgErr) {
		return pgErr.Hint
	}
	return ""
}

// TestTuneAuto creates a tracker with lambda => NULL: after its backfill
// the sidecar's TunePending chooses and applies a lambda, and the replay
// gives the forecasts of an offline fit with it.
func TestTuneAuto(t *testing.T) {
	t.Parallel()
	pool, _ := newDB(t)
	ctx := context.Background()
	exec(t, pool, `CREATE TABLE sales (id bigserial PRIMARY KEY, sold_at timestamptz, shop text, amount numeric)`)
	exec(t, pool, `SELECT sidetrend.track('sales'::regclass, 'sold_at', 'amount', '{shop}', period => 7, harmonics => 2, horizon => 14, lambda => NULL)`)
	insertRows(t, pool, "sales", salesRows(rand.New(rand.NewPCG(15, 15)), 2, 100, 2))
	s := NewSyncer(pool, nil)
	if err := s.CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	tuned, applied, err := TunePending(ctx, pool, 0, nil)
	if err != nil || tuned != 1 || !applied {
		t.Fatalf("TunePending: %d tuned, applied %v, err %v; want 1 and applied", tuned, applied, err)
	}
	var lambda, stored, season, storedSeason float64
	var auto bool
	if err := pool.QueryRow(ctx, `SELECT t.lambda, t.auto_tune, g.lambda, coalesce(t.season_lambda, 0), coalesce(g.season_lambda, 0)
		FROM sidetrend.trackers t
		JOIN sidetrend.tuning g ON g.tracker_id = t.id AND g.scope = 'tracker'`).Scan(&lambda, &auto, &stored, &season, &storedSeason); err != nil {
		t.Fatal(err)
	}
	if lambda != stored || season != storedSeason || !auto {
		t.Fatalf("tracker lambda %v (seasonal %v) auto_tune %v, want the stored %v (%v) and true", lambda, season, auto, stored, storedSeason)
	}
	if err := s.CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	spec := salesSpec
	spec.Lambda, spec.SeasonLambda = lambda, season
	compareForecasts(t, pool, "sales", offlineFit(t, pool, "sales", spec), 14)
	// Results stored and nothing requested: nothing to do.
	if tuned, _, err := TunePending(ctx, pool, 0, nil); err != nil || tuned != 0 {
		t.Errorf("TunePending again: %d tuned (err %v), want 0", tuned, err)
	}
	// An auto tracker tuned again on the same data applies nothing: the
	// lambda in use is already the best one.
	var tid int
	if err := pool.QueryRow(ctx, `SELECT id FROM sidetrend.trackers WHERE name = 'sales'`).Scan(&tid); err != nil {
		t.Fatal(err)
	}
	if applied, err := TuneStored(ctx, pool, tid); err != nil || applied {
		t.Errorf("TuneStored on unchanged data: applied %v (err %v), want false", applied, err)
	}
}
