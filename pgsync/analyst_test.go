package pgsync

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"sort"
	"strings"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgxpool"
	"gonum.org/v1/gonum/floats/scalar"

	"github.com/sidetrend/sidetrend/estimator"
)

// dailySeries is one series of a daily-sum table worked out in Go from a
// SELECT of the table: values from its first day with rows, zero-filled.
type dailySeries struct {
	first int64
	ys    []float64
}

func dailySums(t *testing.T, pool *pgxpool.Pool, table string) map[string]dailySeries {
	t.Helper()
	rows, err := pool.Query(context.Background(), fmt.Sprintf(
		`SELECT shop, sold_at, amount::float8 FROM %s WHERE amount IS NOT NULL AND sold_at IS NOT NULL AND amount::text <> 'NaN'`, table))
	if err != nil {
		t.Fatal(err)
	}
	sums := map[string]map[int64]float64{}
	for rows.Next() {
		var key string
		var ts time.Time
		var v float64
		if err := rows.Scan(&key, &ts, &v); err != nil {
			t.Fatal(err)
		}
		if sums[key] == nil {
			sums[key] = map[int64]float64{}
		}
		sums[key][dayIndex(ts)] += v
	}
	if err := rows.Err(); err != nil {
		t.Fatal(err)
	}
	out := map[string]dailySeries{}
	for key, byDay := range sums {
		first, last := int64(math.MaxInt64), int64(math.MinInt64)
		for d := range byDay {
			first, last = min(first, d), max(last, d)
		}
		ys := make([]float64, 0, last-first+1)
		for d := first; d <= last; d++ {
			ys = append(ys, byDay[d])
		}
		out[key] = dailySeries{first: first, ys: ys}
	}
	return out
}

// sortedKeys returns the keys of m in order.
func sortedKeys[V any](m map[string]V) []string {
	keys := make([]string, 0, len(m))
	for k := range m {
		keys = append(keys, k)
	}
	sort.Strings(keys)
	return keys
}

// TestAccuracyView checks sidetrend.accuracy against the error statistics
// of an offline fit on the same data.
func TestAccuracyView(t *testing.T) {
	t.Parallel()
	pool, _ := newDB(t)
	ctx := context.Background()
	createSales(t, pool, "sales")
	insertRows(t, pool, "sales", salesRows(rand.New(rand.NewPCG(1, 1)), 3, 80, 2))
	if err := NewSyncer(pool, nil).CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	want := offlineFit(t, pool, "sales", salesSpec)
	origin := time.Date(2001, 1, 1, 0, 0, 0, 0, time.UTC)
	series := dailySums(t, pool, "sales")
	rows, err := pool.Query(ctx, `SELECT series_key, n_errors, mae, rmse, mape, bias, coverage80, coverage95, as_of
		FROM sidetrend.accuracy WHERE tracker = 'sales' ORDER BY series_key`)
	if err != nil {
		t.Fatal(err)
	}
	seen := 0
	for rows.Next() {
		var key string
		var n int64
		var mae, rmseV, mape, bias, c80, c95 float64
		var asOf time.Time
		if err := rows.Scan(&key, &n, &mae, &rmseV, &mape, &bias, &c80, &c95, &asOf); err != nil {
			t.Fatal(err)
		}
		seen++
		es := want[key].Errors()
		if n != es.N || n == 0 {
			t.Errorf("series %q: n_errors %d, want %d (and more than 0)", key, n, es.N)
		}
		// Relative 1e-9, as in compareForecasts: only the order of the
		// bucket sums differs.
		for _, c := range []struct {
			name      string
			got, want float64
		}{
			{"mae", mae, es.MAE}, {"rmse", rmseV, es.RMSE}, {"mape", mape, es.MAPE}, {"bias", bias, es.Bias},
			{"coverage80", c80, es.Cov80}, {"coverage95", c95, es.Cov95},
		} {
			if !scalar.EqualWithinAbsOrRel(c.got, c.want, 1e-12, 1e-9) {
				t.Errorf("series %q: %s = %v, want %v", key, c.name, c.got, c.want)
			}
		}
		// MAPE is a fraction: daily takings of about 50 with noise of 3 are
		// a few percent off, not a few hundred.
		if mape <= 0 || mape >= 1 {
			t.Errorf("series %q: mape %v is not a fraction of the actuals", key, mape)
		}
		s := series[key]
		lastDay := origin.AddDate(0, 0, int(s.first)+len(s.ys)-1)
		if !asOf.Equal(lastDay) {
			t.Errorf("series %q: as_of %v, want the newest folded day %v", key, asOf, lastDay)
		}
	}
	if err := rows.Err(); err != nil {
		t.Fatal(err)
	}
	if seen != len(want) {
		t.Errorf("accuracy has %d series, want %d", seen, len(want))
	}
}

// TestActualsAggregates checks sidetrend.actuals against the aggregates
// worked out by hand for a small table, one tracker per aggregate.
func TestActualsAggregates(t *testing.T) {
	t.Parallel()
	pool, _ := newDB(t)
	ctx := context.Background()
	exec(t, pool, `CREATE TABLE meter (at timestamptz, v float8)`)
	for _, agg := range []string{"sum", "count", "mean", "min", "max", "last"} {
		exec(t, pool, `SELECT sidetrend.track('meter', 'at', 'v', agg => $1, name => $1, degree => 0)`, agg)
	}
	exec(t, pool, `INSERT INTO meter VALUES ('2026-05-01 08:00Z', 4), ('2026-05-01 09:00Z', 10), ('2026-05-01 07:00Z', 1),
		('2026-05-02 10:00Z', 7)`)
	if err := NewSyncer(pool, nil).CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	// 1 May: rows 4, 10, 1 (the 9:00 row is the last); 2 May: 7.
	want := map[string]float64{"sum": 15, "count": 3, "mean": 5, "min": 1, "max": 10, "last": 10}
	for agg, w := range want {
		var v float64
		var rowsN int64
		var folded bool
		if err := pool.QueryRow(ctx, `SELECT value, rows, folded FROM sidetrend.actuals
			WHERE tracker = $1 AND period_start = '2026-05-01'`, agg).Scan(&v, &rowsN, &folded); err != nil {
			t.Fatalf("%s: %v", agg, err)
		}
		if v != w || rowsN != 3 || !folded {
			t.Errorf("%s: value %v rows %d folded %v, want %v, 3, true", agg, v, rowsN, folded, w)
		}
	}
}

// TestHistoryAndAccuracyByHorizon records the forecasts an offline fit
// issues after every bucket, keeps the newest 30 issues, and checks
// sidetrend.accuracy_by_horizon against the errors worked out in Go.
func TestHistoryAndAccuracyByHorizon(t *testing.T) {
	t.Parallel()
	pool, _ := newDB(t)
	ctx := context.Background()
	createSales(t, pool, "sales")
	insertRows(t, pool, "sales", salesRows(rand.New(rand.NewPCG(4, 4)), 2, 70, 2))
	if err := NewSyncer(pool, nil).CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	const keep = 30 // history_buckets for this test, below the default 90 so that pruning shows
	const horizon = 14
	exec(t, pool, `UPDATE sidetrend.trackers SET history_buckets = $1 WHERE name = 'sales'`, keep)
	var tid int
	if err := pool.QueryRow(ctx, `SELECT id FROM sidetrend.trackers WHERE name = 'sales'`).Scan(&tid); err != nil {
		t.Fatal(err)
	}
	series := dailySums(t, pool, "sales")
	type acc struct {
		n          int
		abs, sq    float64
		nInt, in95 int
	}
	want := map[string]map[int]*acc{}
	var all []IssuedForecast
	for _, key := range sortedKeys(series) {
		s := series[key]
		last := s.first + int64(len(s.ys)) - 1
		want[key] = map[int]*acc{}
		st, err := estimator.NewState(salesSpec)
		if err != nil {
			t.Fatal(err)
		}
		for i, y := range s.ys {
			if _, err := st.Observe(y); err != nil {
				t.Fatal(err)
			}
			if !st.Ready() {
				continue
			}
			fc, err := st.Forecast(horizon)
			if err != nil {
				t.Fatal(err)
			}
			issued := s.first + int64(i)
			all = append(all, ServedForecast(tid, key, issued, fc))
			if issued <= last-keep {
				continue // pruned
			}
			for l := 1; l <= horizon && issued+int64(l) <= last; l++ {
				e := s.ys[i+l] - fc.Forecast[l-1]
				a := want[key][l]
				if a == nil {
					a = &acc{}
					want[key][l] = a
				}
				a.n++
				a.abs += math.Abs(e)
				a.sq += e * e
				if !math.IsNaN(fc.Lower95[l-1]) {
					a.nInt++
					if s.ys[i+l] >= fc.Lower95[l-1] && s.ys[i+l] <= fc.Upper95[l-1] {
						a.in95++
					}
				}
			}
		}
	}
	// Record in three transactions, oldest first, as batches of the drain
	// would: pruning follows the newest issue of each call.
	for part := 0; part < 3; part++ {
		tx, err := pool.Begin(ctx)
		if err != nil {
			t.Fatal(err)
		}
		var chunk []IssuedForecast
		for i, f := range all {
			if i*3/len(all) == part {
				chunk = append(chunk, f)
			}
		}
		if err := RecordHistory(ctx, tx, chunk); err != nil {
			t.Fatal(err)
		}
		if err := tx.Commit(ctx); err != nil {
			t.Fatal(err)
		}
	}
	// Recording the same forecasts again changes nothing (first served wins).
	tx, err := pool.Begin(ctx)
	if err != nil {
		t.Fatal(err)
	}
	again := all[len(all)-1]
	again.Forecast = append([]float64(nil), again.Forecast...)
	again.Forecast[0] += 1000
	if err := RecordHistory(ctx, tx, []IssuedForecast{again}); err != nil {
		t.Fatal(err)
	}
	if err := tx.Commit(ctx); err != nil {
		t.Fatal(err)
	}

	for _, key := range sortedKeys(series) {
		s := series[key]
		last := s.first + int64(len(s.ys)) - 1
		var lo, hi, n int64
		if err := pool.QueryRow(ctx, `SELECT min(i.issued_for), max(i.issued_for), count(*) FROM sidetrend.forecast_issues i
			CROSS JOIN LATERAL unnest(i.forecast) AS f WHERE i.tracker_id = $1 AND i.series_key = $2`, tid, key).Scan(&lo, &hi, &n); err != nil {
			t.Fatal(err)
		}
		if lo != last-keep+1 || hi != last || n != keep*horizon {
			t.Errorf("series %q keeps issues %d..%d (%d rows), want %d..%d (%d rows)", key, lo, hi, n, last-keep+1, last, keep*horizon)
		}
	}
	var forecast1 float64
	if err := pool.QueryRow(ctx, `SELECT forecast FROM sidetrend.forecast_history WHERE tracker_id = $1 AND series_key = $2
		AND issued_for = TIMESTAMPTZ '2001-01-01 00:00Z' + $3 * interval '1 day' AND horizon = 1`, tid, again.SeriesKey, again.IssuedFor).Scan(&forecast1); err != nil {
		t.Fatal(err)
	}
	if forecast1 != all[len(all)-1].Forecast[0] {
		t.Errorf("a second record of issue %d rewrote forecast to %v", again.IssuedFor, forecast1)
	}
	// issued_for is the start of the issue bucket and period_start the
	// start of the bucket horizon buckets later; tracker is the name.
	var bad int
	if err := pool.QueryRow(ctx, `SELECT count(*) FROM sidetrend.forecast_history h
		WHERE h.period_start <> h.issued_for + h.horizon * interval '1 day'
		   OR extract(epoch FROM h.issued_for - TIMESTAMPTZ '2001-01-01 00:00Z') % 86400 <> 0
		   OR h.tracker IS DISTINCT FROM 'sales'`).Scan(&bad); err != nil || bad != 0 {
		t.Errorf("%d history rows with an issued_for or period_start that is not a bucket's start, or another tracker name (err %v)", bad, err)
	}

	rows, err := pool.Query(ctx, `SELECT series_key, horizon, n, mae, rmse, coverage95 FROM sidetrend.accuracy_by_horizon
		WHERE tracker = 'sales' ORDER BY series_key, horizon`)
	if err != nil {
		t.Fatal(err)
	}
	seen := 0
	for rows.Next() {
		var key string
		var h int
		var n int64
		var mae, rmseV float64
		var cov *float64
		if err := rows.Scan(&key, &h, &n, &mae, &rmseV, &cov); err != nil {
			t.Fatal(err)
		}
		seen++
		a := want[key][h]
		if a == nil {
			t.Errorf("series %q horizon %d: in the view, not in Go", key, h)
			continue
		}
		if n != int64(a.n) {
			t.Errorf("series %q horizon %d: n %d, want %d", key, h, n, a.n)
		}
		// Relative 1e-9: the actuals are bucket sums added in another order.
		if !scalar.EqualWithinAbsOrRel(mae, a.abs/float64(a.n), 1e-12, 1e-9) ||
			!scalar.EqualWithinAbsOrRel(rmseV, math.Sqrt(a.sq/float64(a.n)), 1e-12, 1e-9) {
			t.Errorf("series %q horizon %d: mae %v rmse %v, want %v and %v", key, h, mae, rmseV, a.abs/float64(a.n), math.Sqrt(a.sq/float64(a.n)))
		}
		if cov == nil || *cov != float64(a.in95)/float64(a.nInt) {
			t.Errorf("series %q horizon %d: coverage95 %v, want %d/%d", key, h, deref2(cov), a.in95, a.nInt)
		}
	}
	if err := rows.Err(); err != nil {
		t.Fatal(err)
	}
	wantRows := 0
	for _, m := range want {
		wantRows += len(m)
	}
	if seen != wantRows || seen == 0 {
		t.Errorf("accuracy_by_horizon has %d rows, want %d", seen, wantRows)
	}
}

// TestHistoryOff checks that history_buckets = 0 keeps nothing.
func TestHistoryOff(t *testing.T) {
	t.Parallel()
	pool, _ := newDB(t)
	ctx := context.Background()
	createSales(t, pool, "sales")
	exec(t, pool, `UPDATE sidetrend.trackers SET history_buckets = 0`)
	var tid int
	if err := pool.QueryRow(ctx, `SELECT id FROM sidetrend.trackers`).Scan(&tid); err != nil {
		t.Fatal(err)
	}
	tx, err := pool.Begin(ctx)
	if err != nil {
		t.Fatal(err)
	}
	defer tx.Rollback(ctx)
	f := IssuedForecast{TrackerID: tid, SeriesKey: "a", IssuedFor: 9000, Forecast: []float64{1, 2}, SE: []float64{0.5, math.NaN()}, T95: 2}
	if err := RecordHistory(ctx, tx, []IssuedForecast{f}); err != nil {
		t.Fatal(err)
	}
	var n int
	if err := tx.QueryRow(ctx, `SELECT count(*) FROM sidetrend.forecast_history`).Scan(&n); err != nil || n != 0 {
		t.Errorf("history_buckets = 0 kept %d rows (err %v)", n, err)
	}
	bad := f
	bad.SE = bad.SE[:1]
	if err := RecordHistory(ctx, tx, []IssuedForecast{bad}); err == nil || !strings.Contains(err.Error(), "standard errors") {
		t.Errorf("mismatched slices: err %v, want one about standard errors", err)
	}
}

// TestTurnRule checks the slope-turn rule on sequences of readings.
func TestTurnRule(t *testing.T) {
	t.Parallel()
	cases := []struct {
		readings string
		turns    int
		last     string
	}{
		{"up up up", 0, "up"},
		{"flat up", 0, "up"},             // the first non-flat reading is not a turn
		{"up flat flat down", 1, "down"}, // flat in between does not reset
		{"up flat up", 0, "up"},
		{"up down up", 2, "up"},
		{"down flat flat", 0, "down"},
		{"flat flat", 0, ""},
	}
	for _, c := range cases {
		last, turns := "", 0
		for _, r := range strings.Fields(c.readings) {
			var turned bool
			last, turned = Turn(last, r)
			if turned {
				turns++
			}
		}
		if turns != c.turns || last != c.last {
			t.Errorf("%q: %d turns, last %q; want %d, %q", c.readings, turns, last, c.turns, c.last)
		}
	}
	for _, c := range []struct {
		sl   estimator.Slope
		want string
	}{
		{estimator.Slope{Slope: 2, SE: 1}, "up"},    // t = 2 is the threshold, as in the slopes view
		{estimator.Slope{Slope: -3, SE: 1}, "down"}, // t = -3
		{estimator.Slope{Slope: 1.9, SE: 1}, "flat"},
		{estimator.Slope{Slope: 1, SE: math.NaN()}, "flat"}, // degree 0 or too few points
		{estimator.Slope{Slope: 0, SE: 0}, "flat"},
	} {
		if got := Direction(c.sl); got != c.want {
			t.Errorf("Direction(%+v) = %q, want %q", c.sl, got, c.want)
		}
	}
}

// TestSurpriseWatch runs a series that rises, jumps once and then falls,
// and checks the events against the estimator's own steps and slopes.
func TestSurpriseWatch(t *testing.T) {
	t.Parallel()
	rng := rand.New(rand.NewPCG(5, 5))
	spec := estimator.Spec{Degree: 1, Lambda: 0.9}
	st, err := estimator.NewState(spec)
	if err != nil {
		t.Fatal(err)
	}
	ref := st.Clone()
	// 60 buckets up by 1 per bucket, noise sd 0.5, a jump of 15 at bucket
	// 30 (30 sd: outside any 95 % interval), then 60 buckets down.
	var ys []float64
	for i := 0; i < 120; i++ {
		level := float64(i)
		if i >= 60 {
			level = 120 - float64(i)
		}
		y := level + 0.5*rng.NormFloat64()
		if i == 30 {
			y += 15
		}
		ys = append(ys, y)
	}
	w := &SurpriseWatch{TrackerID: 7, SeriesKey: "k", After: 9}
	var wantOut []int64
	wantTurns, last := 0, ""
	for i, y := range ys {
		step, err := st.Observe(y)
		if err != nil {
			t.Fatal(err)
		}
		rs, _ := ref.Observe(y)
		w.Observed(int64(i), y, step, st)
		if i > 9 && rs.Scored && !math.IsNaN(rs.Lower95) && !rs.In95 {
			wantOut = append(wantOut, int64(i))
		}
		if sl, err := ref.Slope(); err == nil {
			var turned bool
			last, turned = Turn(last, Direction(sl))
			if turned && i > 9 {
				wantTurns++
			}
		}
	}
	var gotOut []int64
	turns := 0
	for _, e := range w.Events {
		switch e.Kind {
		case SurpriseOutside95:
			gotOut = append(gotOut, e.Bucket)
			if !(e.Actual < e.Lower95 || e.Actual > e.Upper95) || math.Abs(e.Z) < 1.9 {
				t.Errorf("outside95 event %+v is not outside its interval", e)
			}
		case SurpriseSlopeTurn:
			turns++
			if e.Direction != "down" || e.SlopeT > -2 {
				t.Errorf("slope_turn event %+v: want a turn down with slope_t <= -2", e)
			}
		}
	}
	if fmt.Sprint(gotOut) != fmt.Sprint(wantOut) {
		t.Errorf("outside95 at %v, want %v", gotOut, wantOut)
	}
	if len(wantOut) == 0 || wantOut[0] > 30 || !containsInt(wantOut, 30) {
		t.Errorf("the jump at bucket 30 is not among the outside95 events %v", wantOut)
	}
	if turns != wantTurns || turns != 1 {
		t.Errorf("%d slope turns, want %d (and exactly the one turn down)", turns, wantTurns)
	}
	if w.LastDirection != "down" {
		t.Errorf("last direction %q, want down", w.LastDirection)
	}
}

func containsInt(xs []int64, x int64) bool {
	for _, v := range xs {
		if v == x {
			return true
		}
	}
	return false
}

// TestRecordSurprises stores events, checks the rows and the
// notifications (split under the payload limit), and that recording the
// same events again or rolling back announces nothing.
func TestRecordSurprises(t *testing.T) {
	t.Parallel()
	pool, url := newDB(t)
	ctx := context.Background()
	createSales(t, pool, "sales")
	var tid int
	if err := pool.QueryRow(ctx, `SELECT id FROM sidetrend.trackers`).Scan(&tid); err != nil {
		t.Fatal(err)
	}
	listener, err := pgx.Connect(ctx, url)
	if err != nil {
		t.Fatal(err)
	}
	defer listener.Close(ctx)
	if _, err := listener.Exec(ctx, `LISTEN `+pgx.Identifier{SurpriseChannel}.Sanitize()); err != nil {
		t.Fatal(err)
	}
	// 60 events with keys of 300 bytes and one with a key of 9000: the
	// notifications name them by id only, so they stay small.
	var evs []Surprise
	for i := 0; i < 60; i++ {
		key := fmt.Sprintf("%03d-", i) + strings.Repeat("x", 296)
		evs = append(evs, Surprise{TrackerID: tid, SeriesKey: key, Bucket: 9000 + int64(i), Kind: SurpriseOutside95,
			Actual: 10, Forecast: 5, Lower95: 6, Upper95: 8, Z: 4, Slope: math.NaN(), SlopeT: math.NaN()})
	}
	evs = append(evs, Surprise{TrackerID: tid, SeriesKey: strings.Repeat("y", 9000), Bucket: 9100, Kind: SurpriseSlopeTurn,
		Actual: 3, Forecast: math.NaN(), Lower95: math.NaN(), Upper95: math.NaN(), Z: -2.5, Slope: -0.3, SlopeT: -2.5, Direction: "down"})
	record := func(evs []Surprise, commit bool) {
		t.Helper()
		tx, err := pool.Begin(ctx)
		if err != nil {
			t.Fatal(err)
		}
		if err := RecordSurprises(ctx, tx, evs); err != nil {
			t.Fatal(err)
		}
		if commit {
			err = tx.Commit(ctx)
		} else {
			err = tx.Rollback(ctx)
		}
		if err != nil {
			t.Fatal(err)
		}
	}
	record(evs, true)
	ids := map[int64]bool{}
	notes := 0
	for len(ids) < len(evs) {
		wait, cancel := context.WithTimeout(ctx, 10*time.Second)
		n, err := listener.WaitForNotification(wait)
		cancel()
		if err != nil {
			t.Fatalf("after %d notifications with %d events: %v", notes, len(ids), err)
		}
		notes++
		if len(n.Payload) >= 8000 {
			t.Errorf("payload of %d bytes: Postgres accepts fewer than 8000", len(n.Payload))
		}
		var arr []map[string]any
		if err := json.Unmarshal([]byte(n.Payload), &arr); err != nil {
			t.Fatalf("payload is not a JSON array: %v", err)
		}
		for _, e := range arr {
			ids[int64(e["id"].(float64))] = true
			// Any role may LISTEN: a notification carries ids, no value,
			// key or tracker name.
			if len(e) != 3 || e["tracker_id"] != float64(tid) || e["kind"] == nil {
				t.Errorf("event %v: want exactly id, tracker_id %d and kind", e, tid)
			}
		}
	}
	if notes < 1 {
		t.Errorf("%d notifications, want at least one", notes)
	}
	var n int
	var start time.Time
	if err := pool.QueryRow(ctx, `SELECT count(*), min(period_start) FROM sidetrend.surprises`).Scan(&n, &start); err != nil {
		t.Fatal(err)
	}
	// Bucket 9000 of a daily UTC tracker starts 9000 days after 2001-01-01.
	if n != len(evs) || !start.Equal(time.Date(2001, 1, 1, 0, 0, 0, 0, time.UTC).AddDate(0, 0, 9000)) {
		t.Errorf("%d surprises from %v; want %d from bucket 9000's day", n, start, len(evs))
	}
	var turn struct {
		dir          string
		slopeT       float64
		forecastNull bool
	}
	if err := pool.QueryRow(ctx, `SELECT direction, slope_t, forecast IS NULL FROM sidetrend.surprises WHERE kind = 'slope_turn'`).
		Scan(&turn.dir, &turn.slopeT, &turn.forecastNull); err != nil {
		t.Fatal(err)
	}
	if turn.dir != "down" || turn.slopeT != -2.5 || !turn.forecastNull {
		t.Errorf("slope_turn row %+v, want down, -2.5, NULL forecast", turn)
	}

	// Again, and a rolled-back new one: no notification. A marker event
	// committed last proves that nothing came before it.
	record(evs[:5], true)
	record([]Surprise{{TrackerID: tid, SeriesKey: "rolled back", Bucket: 1, Kind: SurpriseOutside95}}, false)
	record([]Surprise{{TrackerID: tid, SeriesKey: "marker", Bucket: 1, Kind: SurpriseOutside95,
		Actual: math.NaN(), Forecast: math.NaN(), Lower95: math.NaN(), Upper95: math.NaN(), Z: math.NaN(), Slope: math.NaN(), SlopeT: math.NaN()}}, true)
	wait, cancel := context.WithTimeout(ctx, 10*time.Second)
	defer cancel()
	note, err := listener.WaitForNotification(wait)
	if err != nil {
		t.Fatal(err)
	}
	var marker int64
	if err := pool.QueryRow(ctx, `SELECT id FROM sidetrend.surprises WHERE series_key = 'marker'`).Scan(&marker); err != nil {
		t.Fatal(err)
	}
	if want := fmt.Sprintf(`[{"id":%d,"tracker_id":%d,"kind":"outside95"}]`, marker, tid); note.Payload != want {
		t.Errorf("next notification %s, want only the marker event %s", note.Payload, want)
	}
	tx, err := pool.Begin(ctx)
	if err != nil {
		t.Fatal(err)
	}
	defer tx.Rollback(ctx)
	err = RecordSurprises(ctx, tx, []Surprise{{TrackerID: tid, SeriesKey: "a", Kind: "odd"}})
	if err == nil || !strings.Contains(err.Error(), "unknown kind") {
		t.Errorf("kind odd: err %v, want unknown kind", err)
	}
}

// TestPackPayloads checks the packing of JSON values into arrays.
func TestPackPayloads(t *testing.T) {
	t.Parallel()
	items := [][]byte{[]byte(`1`), []byte(`22`), []byte(`333`), []byte(`4444`)}
	// Limit 8: "[1,22]" (6) fits, adding ",333" would make 10.
	got := packPayloads(items, 8)
	want := []string{"[1,22]", "[333]", "[4444]"}
	if fmt.Sprint(got) != fmt.Sprint(want) {
		t.Errorf("packPayloads = %q, want %q", got, want)
	}
	if got := packPayloads(nil, 8); len(got) != 0 {
		t.Errorf("packPayloads(nil) = %q, want none", got)
	}
}

// TestNormalCDF checks sidetrend.normal_cdf against Go's math.Erfc:
// Phi(x) = erfc(-x / sqrt 2) / 2.
func TestNormalCDF(t *testing.T) {
	t.Parallel()
	pool, _ := newDB(t)
	xs := []float64{-40, -10, -8, -5, -3, -1.959963984540054, -1, -0.1, 0, 0.3, 1, 1.6448536269514722, 2.5, 4, 7, 9, 39}
	for _, x := range xs {
		var got float64
		if err := pool.QueryRow(context.Background(), `SELECT sidetrend.normal_cdf($1)`, x).Scan(&got); err != nil {
			t.Fatal(err)
		}
		want := 0.5 * math.Erfc(-x/math.Sqrt2)
		// Absolute 1e-14: Marsaglia (2004) gives about 1e-15 absolute for
		// his series in double precision; allow ten times that.
		if math.Abs(got-want) > 1e-14 {
			t.Errorf("normal_cdf(%v) = %v, want %v", x, got, want)
		}
	}
	var isNull bool
	if err := pool.QueryRow(context.Background(), `SELECT sidetrend.normal_cdf(NULL) IS NULL`).Scan(&isNull); err != nil || !isNull {
		t.Errorf("normal_cdf(NULL) is not NULL (err %v)", err)
	}
}

// TestAnalystObjectsCommented checks that every view and function of
// migration 00004 has a COMMENT ON (shown by \d+ and \df+), and logs any
// other view or function of schema sidetrend that lacks one.
func TestAnalystObjectsCommented(t *testing.T) {
	t.Parallel()
	pool, _ := newDB(t)
	ctx := context.Background()
	mine := []string{
		"sidetrend.tracker_settings", "sidetrend.actuals", "sidetrend.accuracy", "sidetrend.accuracy_by_horizon",
		"sidetrend.tuning", "sidetrend.tune_requests", "sidetrend.surprises", "sidetrend.forecast_history",
	}
	for _, rel := range mine {
		var c *string
		if err := pool.QueryRow(ctx, `SELECT obj_description($1::regclass, 'pg_class')`, rel).Scan(&c); err != nil {
			t.Fatal(err)
		}
		if c == nil || *c == "" {
			t.Errorf("%s has no comment", rel)
		}
	}
	fns := []string{"point_value", "bucket_ceil", "normal_cdf", "request_tune", "tune", "create_roles", "grant_roles"}
	for _, fn := range fns {
		var c *string
		err := pool.QueryRow(ctx, `SELECT obj_description(p.oid, 'pg_proc') FROM pg_proc p
			WHERE p.pronamespace = 'sidetrend'::regnamespace AND p.proname = $1`, fn).Scan(&c)
		if errors.Is(err, pgx.ErrNoRows) {
			t.Errorf("function sidetrend.%s does not exist", fn)
			continue
		}
		if err != nil {
			t.Fatal(err)
		}
		if c == nil || *c == "" {
			t.Errorf("function sidetrend.%s has no comment", fn)
		}
	}
	rows, err := pool.Query(ctx, `
		SELECT c.relname FROM pg_class c WHERE c.relnamespace = 'sidetrend'::regnamespace AND c.relkind = 'v'
		  AND obj_description(c.oid, 'pg_class') IS NULL
		UNION ALL
		SELECT p.oid::regprocedure::text FROM pg_proc p WHERE p.pronamespace = 'sidetrend'::regnamespace
		  AND obj_description(p.oid, 'pg_proc') IS NULL AND p.proname NOT LIKE '\_%'`)
	if err != nil {
		t.Fatal(err)
	}
	missing, err := pgx.CollectRows(rows, pgx.RowTo[string])
	if err != nil {
		t.Fatal(err)
	}
	if len(missing) > 0 {
		t.Logf("objects of other migrations without a comment: %v", missing)
	}
}

// TestAlertRecipes runs every recipe of sql/alerts.sql on the sales
// scenario with two recorded surprises.
func TestAlertRecipes(t *testing.T) {
	t.Parallel()
	pool, _ := newDB(t)
	ctx := context.Background()
	recipes, order := readRecipes(t, "../sql/alerts.sql")
	if len(order) < 5 {
		t.Fatalf("sql/alerts.sql has recipes %v, want at least 5", order)
	}
	createSales(t, pool, "sales")
	insertRows(t, pool, "sales", salesRows(rand.New(rand.NewPCG(6, 6)), 3, 60, 2))
	if err := NewSyncer(pool, nil).CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	var tid int
	if err := pool.QueryRow(ctx, `SELECT id FROM sidetrend.trackers`).Scan(&tid); err != nil {
		t.Fatal(err)
	}
	tx, err := pool.Begin(ctx)
	if err != nil {
		t.Fatal(err)
	}
	nan := math.NaN()
	if err := RecordSurprises(ctx, tx, []Surprise{
		{TrackerID: tid, SeriesKey: "shop 1", Bucket: 9200, Kind: SurpriseOutside95, Actual: 90, Forecast: 60, Lower95: 52, Upper95: 68, Z: 7.4, Slope: nan, SlopeT: nan},
		{TrackerID: tid, SeriesKey: "shop 2", Bucket: 9200, Kind: SurpriseSlopeTurn, Actual: 55, Forecast: nan, Lower95: nan, Upper95: nan, Z: -2.2, Slope: -0.4, SlopeT: -2.2, Direction: "down"},
	}); err != nil {
		t.Fatal(err)
	}
	if err := tx.Commit(ctx); err != nil {
		t.Fatal(err)
	}
	for _, name := range order {
		rows, err := pool.Query(ctx, recipes[name])
		if err != nil {
			t.Errorf("recipe %s: %v", name, err)
			continue
		}
		var n int
		var first []any
		for rows.Next() {
			if n == 0 {
				first, _ = rows.Values()
			}
			n++
		}
		if err := rows.Err(); err != nil {
			t.Errorf("recipe %s: %v", name, err)
		}
		switch name {
		case "surprised_today":
			// Largest |z| first: the outside95 event of shop 1.
			if n != 2 || first[1] != "shop 1" {
				t.Errorf("surprised_today: %d rows, first %v; want 2, shop 1 first", n, first)
			}
		case "surprises_per_tracker":
			if n != 2 {
				t.Errorf("surprises_per_tracker: %d rows, want one per kind", n)
			}
		case "trend_now":
			// The series whose offline fit has a slope that is not flat.
			want := 0
			for _, st := range offlineFit(t, pool, "sales", salesSpec) {
				if sl, err := st.Slope(); err == nil && Direction(sl) != "flat" {
					want++
				}
			}
			if n != want || n == 0 {
				t.Errorf("trend_now: %d rows, want %d (and some)", n, want)
			}
		}
	}
}

// TestDrainPrunesHistory folds a series one bucket per catch-up with
// history_buckets = 5 and checks that the drain itself keeps exactly the
// forecasts issued in the newest 5 buckets: issued_for in (N - 5, N] for the
// newest folded bucket N, one row each.
func TestDrainPrunesHistory(t *testing.T) {
	t.Parallel()
	pool, _ := newDB(t)
	ctx := context.Background()
	exec(t, pool, `CREATE TABLE readings (at timestamptz, v float8)`)
	exec(t, pool, `SELECT sidetrend.track('readings', 'at', 'v', lambda => 0.9, horizon => 3)`)
	exec(t, pool, `UPDATE sidetrend.trackers SET history_buckets = 5`)
	s := NewSyncer(pool, nil)
	for d := 0; d < 25; d++ {
		exec(t, pool, `INSERT INTO readings VALUES ('2026-03-02 09:00Z'::timestamptz + $1 * interval '1 day', 10 + $1::int % 4)`, d)
		if err := s.CatchUp(ctx); err != nil {
			t.Fatal(err)
		}
	}
	var n, lo, hi, folded, first int64
	err := pool.QueryRow(ctx, `
		SELECT count(*), min(h.issued_for), max(h.issued_for),
		       (SELECT folded_through FROM sidetrend.series), (SELECT first_bucket FROM sidetrend.series)
		FROM sidetrend.forecast_issues h`).Scan(&n, &lo, &hi, &folded, &first)
	if err != nil {
		t.Fatal(err)
	}
	// 25 days, all long past: days 0 to 24 folded, one batch each (the
	// drain once rewrote first_bucket as 0 on every incremental batch).
	if first != folded-24 {
		t.Errorf("first_bucket %d after 25 incremental batches, want %d (day 0)", first, folded-24)
	}
	if n != 5 || hi != folded || lo != folded-4 {
		t.Errorf("forecast history: %d rows issued at %d..%d with bucket %d folded; want 5 rows issued at %d..%d",
			n, lo, hi, folded, folded-4, folded)
	}
}
