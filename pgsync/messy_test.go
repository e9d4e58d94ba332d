package pgsync

import (
	"context"
	"fmt"
	"math"
	"math/rand/v2"
	"os"
	"sort"
	"strconv"
	"testing"
	"time"

	"github.com/jackc/pgx/v5/pgxpool"
	"gonum.org/v1/gonum/floats/scalar"

	"github.com/sidetrend/sidetrend/calendar"
	"github.com/sidetrend/sidetrend/estimator"
)

// refTracker describes a tracker for the from-scratch reference fit.
type refTracker struct {
	name    string
	table   string
	agg     string
	empty   string
	bucket  string
	tz      string
	spec    estimator.Spec
	horizon int
}

// referenceFit computes, from SELECT of the source table alone, what every
// series' state must be: rows bucketed with the Go calendar (which is tested
// against the SQL one in package calendar), aggregated, empty buckets filled
// by the tracker's policy, fitted from scratch. Source table columns: at
// (timestamptz), k (text), v (float8).
func referenceFit(t *testing.T, pool *pgxpool.Pool, r refTracker) map[string]*estimator.State {
	t.Helper()
	w, err := calendar.ParseWidth(r.bucket)
	if err != nil {
		t.Fatal(err)
	}
	cal, err := calendar.New(w, r.tz)
	if err != nil {
		t.Fatal(err)
	}
	rows, err := pool.Query(context.Background(), fmt.Sprintf(
		`SELECT k, at, v FROM %s WHERE at IS NOT NULL AND v IS NOT NULL AND v <> 'NaN' AND abs(v) <= 1e150 AND isfinite(at)`, r.table))
	if err != nil {
		t.Fatal(err)
	}
	type agg struct {
		n             int
		sum, min, max float64
		lastT         time.Time
		last          float64
	}
	byKey := map[string]map[int64]*agg{}
	for rows.Next() {
		var k *string
		var at time.Time
		var v float64
		if err := rows.Scan(&k, &at, &v); err != nil {
			t.Fatal(err)
		}
		key := ""
		if k != nil {
			key = *k
		}
		if byKey[key] == nil {
			byKey[key] = map[int64]*agg{}
		}
		b := cal.Index(at)
		a := byKey[key][b]
		if a == nil {
			a = &agg{min: math.Inf(1), max: math.Inf(-1)}
			byKey[key][b] = a
		}
		a.n++
		a.sum += v
		a.min, a.max = math.Min(a.min, v), math.Max(a.max, v)
		if a.n == 1 || at.After(a.lastT) || (at.Equal(a.lastT) && v > a.last) {
			a.lastT, a.last = at, v
		}
	}
	if err := rows.Err(); err != nil {
		t.Fatal(err)
	}
	out := map[string]*estimator.State{}
	now := time.Now()
	for key, buckets := range byKey {
		idx := make([]int64, 0, len(buckets))
		for b := range buckets {
			idx = append(idx, b)
		}
		sort.Slice(idx, func(i, j int) bool { return idx[i] < idx[j] })
		// The newest bucket is folded only once the clock has passed its end.
		if last := idx[len(idx)-1]; cal.Start(last + 1).After(now) {
			idx = idx[:len(idx)-1]
			if len(idx) == 0 {
				continue
			}
		}
		var ys []float64
		for b := idx[0]; b <= idx[len(idx)-1]; b++ {
			a := buckets[b]
			if a == nil {
				if r.empty == "zero" {
					ys = append(ys, 0)
				} else {
					ys = append(ys, math.NaN())
				}
				continue
			}
			switch r.agg {
			case "sum":
				ys = append(ys, a.sum)
			case "count":
				ys = append(ys, float64(a.n))
			case "mean":
				ys = append(ys, a.sum/float64(a.n))
			case "min":
				ys = append(ys, a.min)
			case "max":
				ys = append(ys, a.max)
			case "last":
				ys = append(ys, a.last)
			}
		}
		st, err := estimator.Fit(r.spec, ys)
		if err != nil {
			t.Fatal(err)
		}
		out[key] = st
	}
	return out
}

// compareAll checks forecasts and slopes of tracker r against the reference.
func compareAll(t *testing.T, pool *pgxpool.Pool, r refTracker, want map[string]*estimator.State, context string) {
	t.Helper()
	compareForecasts(t, pool, r.name, want, r.horizon)
	rows, err := pool.Query(contextBG(), `SELECT series_key, level, slope, slope_se FROM sidetrend.slopes WHERE tracker = $1`, r.name)
	if err != nil {
		t.Fatal(err)
	}
	seen := 0
	for rows.Next() {
		var key string
		var level, slope, se *float64
		if err := rows.Scan(&key, &level, &slope, &se); err != nil {
			t.Fatal(err)
		}
		seen++
		st := want[key]
		if st == nil {
			t.Errorf("%s: tracker %s has a slope for series %q that the table does not have", context, r.name, key)
			continue
		}
		sl, err := st.Slope()
		if err != nil {
			t.Errorf("%s: tracker %s series %q: view has a slope, reference is not ready", context, r.name, key)
			continue
		}
		for _, c := range []struct {
			name string
			got  *float64
			want float64
		}{{"level", level, sl.Level}, {"slope", slope, sl.Slope}, {"slope_se", se, sl.SE}} {
			if math.IsNaN(c.want) {
				if c.got != nil {
					t.Errorf("%s: %s %q %s = %v, want NULL", context, r.name, key, c.name, *c.got)
				}
				continue
			}
			// Relative 1e-9: sums folded in another order differ in the last
			// digits (float addition is not associative), nothing more.
			if c.got == nil || !scalar.EqualWithinAbsOrRel(*c.got, c.want, 1e-9*math.Max(1, math.Abs(sl.Level)), 1e-9) {
				t.Errorf("%s: %s %q %s = %v, want %v", context, r.name, key, c.name, deref2(c.got), c.want)
			}
		}
	}
	ready := 0
	for _, st := range want {
		if st.Ready() {
			ready++
		}
	}
	if seen != ready {
		t.Errorf("%s: tracker %s has %d slopes, reference has %d ready series", context, r.name, seen, ready)
	}
}

func contextBG() context.Context { return context.Background() }

// TestMessyHistoryEqualsFreshFit applies random sequences of inserts, late
// inserts, updates of value, time and key, deletes, duplicate loads and
// gaps, in random batch sizes, with catch-ups between random steps. After
// every catch-up, forecasts and slopes of four trackers on the same table
// (sum in UTC, mean in Berlin, max with gaps, last) equal a fit from scratch
// on SELECT of the table. Seeded: SIDETREND_SEED=n reproduces a run.
func TestMessyHistoryEqualsFreshFit(t *testing.T) {
	t.Parallel()
	seed := uint64(20261201)
	if s := os.Getenv("SIDETREND_SEED"); s != "" {
		v, err := strconv.ParseUint(s, 10, 64)
		if err != nil {
			t.Fatal(err)
		}
		seed = v
	}
	t.Logf("seed %d (rerun with SIDETREND_SEED=%d)", seed, seed)
	rng := rand.New(rand.NewPCG(seed, seed))
	pool, _ := newDB(t)
	ctx := context.Background()
	exec(t, pool, `CREATE TABLE obs (id bigserial PRIMARY KEY, at timestamptz, k text, v float8)`)
	spec := estimator.Spec{Degree: 1, Lambda: 0.9}
	trackers := []refTracker{
		{name: "obs_sum", agg: "sum", empty: "zero", tz: "UTC"},
		{name: "obs_mean", agg: "mean", empty: "gap", tz: "Europe/Berlin"},
		{name: "obs_max", agg: "max", empty: "gap", tz: "UTC"},
		{name: "obs_last", agg: "last", empty: "gap", tz: "America/New_York"},
	}
	for i := range trackers {
		r := &trackers[i]
		r.table, r.bucket, r.spec, r.horizon = "obs", "1 day", spec, 5
		exec(t, pool, `SELECT sidetrend.track('obs', 'at', 'v', '{k}', agg => $1, empty => $2, tz => $3,
			lambda => 0.9, horizon => 5, name => $4)`, r.agg, r.empty, r.tz, r.name)
	}
	start := time.Date(2026, 2, 1, 0, 0, 0, 0, time.UTC)
	keys := []string{"north", "south", "o'hare", "big key 🚲"}
	randRow := func(maxDay int) []any {
		at := start.Add(time.Duration(rng.Int64N(int64(maxDay) * 86400 * 1e9)))
		return []any{at, keys[rng.IntN(len(keys))], math.Round((20+10*rng.NormFloat64())*100) / 100}
	}
	insert := func(rows [][]any) {
		for _, r := range rows {
			exec(t, pool, `INSERT INTO obs (at, k, v) VALUES ($1, $2, $3)`, r...)
		}
	}
	// History to start with, taken in by the backfill.
	var first [][]any
	for i := 0; i < 150; i++ {
		first = append(first, randRow(30))
	}
	insert(first)
	s := NewSyncer(pool, nil)
	day := 30
	steps := 60
	if testing.Short() {
		steps = 25
	}
	for step := 0; step < steps; step++ {
		op := rng.IntN(7)
		switch op {
		case 0, 1: // new rows for the next days, in one multi-row statement
			day += 1 + rng.IntN(2)
			n := 1 + rng.IntN(12)
			var sb []any
			sql := `INSERT INTO obs (at, k, v) VALUES `
			for i := 0; i < n; i++ {
				r := randRow(day)
				r[0] = start.Add(time.Duration(day-1)*24*time.Hour + time.Duration(rng.IntN(86400))*time.Second)
				if i > 0 {
					sql += ", "
				}
				sql += fmt.Sprintf("($%d, $%d, $%d)", 3*i+1, 3*i+2, 3*i+3)
				sb = append(sb, r...)
			}
			exec(t, pool, sql, sb...)
		case 2: // late rows for days already folded
			for i := 0; i < 1+rng.IntN(5); i++ {
				insert([][]any{randRow(day)})
			}
		case 3: // corrections: value, time or key
			switch rng.IntN(3) {
			case 0:
				exec(t, pool, `UPDATE obs SET v = v * 1.5 + 1 WHERE id % 7 = $1`, rng.IntN(7))
			case 1:
				exec(t, pool, `UPDATE obs SET at = at - interval '1 day' * $2 WHERE id % 11 = $1`, rng.IntN(11), 1+rng.IntN(3))
			default:
				exec(t, pool, `UPDATE obs SET k = $2 WHERE id % 13 = $1`, rng.IntN(13), keys[rng.IntN(len(keys))])
			}
		case 4: // deletes
			exec(t, pool, `DELETE FROM obs WHERE id % 17 = $1`, rng.IntN(17))
		case 5: // the same rows loaded twice
			exec(t, pool, `INSERT INTO obs (at, k, v) SELECT at, k, v FROM obs WHERE id % 19 = $1`, rng.IntN(19))
		case 6: // a gap: skip a few days
			day += 2 + rng.IntN(4)
		}
		if rng.IntN(3) == 0 || step == steps-1 {
			if err := s.CatchUp(ctx); err != nil {
				t.Fatalf("seed %d step %d: %v", seed, step, err)
			}
			for _, r := range trackers {
				compareAll(t, pool, r, referenceFit(t, pool, r), fmt.Sprintf("seed %d step %d", seed, step))
			}
			if t.Failed() {
				t.Fatalf("seed %d: mismatch after step %d", seed, step)
			}
		}
	}
	st := s.Stats()
	t.Logf("checked %d steps: %d changes, %d series writes, %d replays", steps, st.Changes, st.Series, st.Rebuilds)
}

// TestTimeZonesAndCalendars checks bucketing in the tracker's zone.
func TestTimeZonesAndCalendars(t *testing.T) {
	t.Parallel()
	pool, _ := newDB(t)
	ctx := context.Background()
	exec(t, pool, `CREATE TABLE tz_obs (at timestamptz, v float8)`)
	exec(t, pool, `SELECT sidetrend.track('tz_obs', 'at', 'v', tz => 'Europe/Berlin', name => 'berlin_daily', agg => 'count')`)
	exec(t, pool, `SELECT sidetrend.track('tz_obs', 'at', 'v', tz => 'Europe/Berlin', name => 'berlin_monthly', bucket => '1 month', agg => 'count')`)
	// 23:30 UTC on 2026-01-14 is 00:30 on the 15th in Berlin (UTC+1 in winter).
	exec(t, pool, `INSERT INTO tz_obs VALUES ('2026-01-14 23:30:00+00', 1)`)
	// The DST days: 2026-03-29 has 23 hours, 2026-10-25 has 25. Rows at the
	// first and the last local minute of each fall into that one day.
	exec(t, pool, `INSERT INTO tz_obs VALUES
		('2026-03-29 00:00:00 Europe/Berlin', 1), ('2026-03-29 23:59:00 Europe/Berlin', 1),
		('2026-10-25 00:00:00 Europe/Berlin', 1), ('2026-10-25 23:59:00 Europe/Berlin', 1),
		('2026-10-31 23:30:00+00', 1)`)
	s := NewSyncer(pool, nil)
	if err := s.CatchUp(ctx); err != nil {
		t.Fatal(err)
	}
	type pt struct {
		start string
		n     int64
	}
	utc := func(t time.Time) string { return t.UTC().Format(time.RFC3339) }
	bucketsOf := func(tracker string) []pt {
		rows, err := pool.Query(ctx, `
			SELECT sidetrend.bucket_start(p.bucket, t.bucket, t.tz), p.n
			FROM sidetrend.points p JOIN sidetrend.trackers t ON t.id = p.tracker_id
			WHERE t.name = $1 ORDER BY p.bucket`, tracker)
		if err != nil {
			t.Fatal(err)
		}
		var out []pt
		for rows.Next() {
			var p pt
			var start time.Time
			if err := rows.Scan(&start, &p.n); err != nil {
				t.Fatal(err)
			}
			p.start = utc(start)
			out = append(out, p)
		}
		return out
	}
	berlin, _ := time.LoadLocation("Europe/Berlin")
	daily := bucketsOf("berlin_daily")
	want := []pt{
		{utc(time.Date(2026, 1, 15, 0, 0, 0, 0, berlin)), 1},
		{utc(time.Date(2026, 3, 29, 0, 0, 0, 0, berlin)), 2},
		{utc(time.Date(2026, 10, 25, 0, 0, 0, 0, berlin)), 2},
		{utc(time.Date(2026, 11, 1, 0, 0, 0, 0, berlin)), 1}, // 23:30 UTC on Oct 31 is 00:30 CET on Nov 1
	}
	if fmt.Sprint(daily) != fmt.Sprint(want) {
		t.Errorf("daily Berlin buckets %v, want %v", daily, want)
	}
	// The DST days are 23 and 25 hours long.
	var h1, h2 float64
	if err := pool.QueryRow(ctx, `SELECT
		extract(epoch FROM sidetrend.bucket_start(sidetrend.bucket_index('2026-03-29 12:00 Europe/Berlin'::timestamptz, '1 day', 'Europe/Berlin') + 1, '1 day', 'Europe/Berlin')
		                 - sidetrend.bucket_start(sidetrend.bucket_index('2026-03-29 12:00 Europe/Berlin'::timestamptz, '1 day', 'Europe/Berlin'), '1 day', 'Europe/Berlin')) / 3600,
		extract(epoch FROM sidetrend.bucket_start(sidetrend.bucket_index('2026-10-25 12:00 Europe/Berlin'::timestamptz, '1 day', 'Europe/Berlin') + 1, '1 day', 'Europe/Berlin')
		                 - sidetrend.bucket_start(sidetrend.bucket_index('2026-10-25 12:00 Europe/Berlin'::timestamptz, '1 day', 'Europe/Berlin'), '1 day', 'Europe/Berlin')) / 3600`).Scan(&h1, &h2); err != nil {
		t.Fatal(err)
	}
	if h1 != 23 || h2 != 25 {
		t.Errorf("DST days are %v and %v hours, want 23 and 25", h1, h2)
	}
	monthly := bucketsOf("berlin_monthly")
	wantM := []pt{
		{utc(time.Date(2026, 1, 1, 0, 0, 0, 0, berlin)), 1},
		{utc(time.Date(2026, 3, 1, 0, 0, 0, 0, berlin)), 2},
		{utc(time.Date(2026, 10, 1, 0, 0, 0, 0, berlin)), 2},
		{utc(time.Date(2026, 11, 1, 0, 0, 0, 0, berlin)), 1},
	}
	if fmt.Sprint(monthly) != fmt.Sprint(wantM) {
		t.Errorf("monthly Berlin buckets %v, want %v (months start on the 1st, local)", monthly, wantM)
	}
}
