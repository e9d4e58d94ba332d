package pgsync

import (
	"context"
	"fmt"
	"math"
	"math/rand/v2"
	"os"
	"strings"
	"testing"
	"time"

	"github.com/jackc/pgx/v5/pgxpool"
	"gonum.org/v1/gonum/floats/scalar"

	"github.com/sidetrend/sidetrend/estimator"
)

// readRecipes splits a file of SQL recipes at its "-- recipe: NAME" lines and
// returns each recipe's text by name, and the names in file order.
func readRecipes(t *testing.T, path string) (map[string]string, []string) {
	t.Helper()
	b, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	out := map[string]string{}
	var order []string
	var name string
	var sb strings.Builder
	flush := func() {
		if name != "" {
			out[name] = sb.String()
			order = append(order, name)
		}
		sb.Reset()
	}
	for _, line := range strings.SplitAfter(string(b), "\n") {
		if n, ok := strings.CutPrefix(strings.TrimSpace(line), "-- recipe: "); ok {
			flush()
			name = strings.TrimSpace(n)
			continue
		}
		if name != "" {
			sb.WriteString(line)
		}
	}
	flush()
	return out, order
}

// fuelDepots is the scenario of the budget test: a regional bus operator
// buys diesel several times a day at three depots and budgets the spend per
// depot by month, quarter and year. Levels, trends and the weekly swing
// are invented.
var fuelDepots = []struct {
	name          string
	level, growth float64
}{
	{"airport depot", 1800, 2.5},
	{"harbour depot", 950, -1.2},
	{"north depot", 1300, 0.4},
}

// fuelRows returns purchases from 2026-01-05 up to and including the
// morning of 2026-03-18 (the open bucket of the test's clock), and the daily
// totals per depot by day index.
func fuelRows(rng *rand.Rand) ([][]any, map[string]map[int64]float64) {
	start := time.Date(2026, 1, 5, 0, 0, 0, 0, time.UTC)
	end := time.Date(2026, 3, 18, 11, 0, 0, 0, time.UTC)
	var rows [][]any
	sums := map[string]map[int64]float64{}
	for d := 0; ; d++ {
		day := start.AddDate(0, 0, d)
		if !day.Before(end) {
			break
		}
		for _, dp := range fuelDepots {
			if sums[dp.name] == nil {
				sums[dp.name] = map[int64]float64{}
			}
			// Sundays run a thin timetable: some depots buy nothing then
			// (an empty bucket, a zero by the sum policy).
			if day.Weekday() == time.Sunday && rng.IntN(3) == 0 {
				continue
			}
			week := 1 - 0.25*math.Cos(2*math.Pi*float64(day.Weekday())/7)
			total := (dp.level + dp.growth*float64(d)) * week * (1 + 0.04*rng.NormFloat64())
			for k := 0; k < 3; k++ {
				ts := day.Add(time.Duration(6+5*k) * time.Hour)
				if !ts.Before(end) {
					continue
				}
				v := math.Round(total/3*100) / 100
				rows = append(rows, []any{ts, dp.name, v})
				sums[dp.name][dayIndex(ts)] += v
			}
		}
	}
	return rows, sums
}

// TestBudgetRecipes runs every recipe of sql/budgets.sql on the fuel
// scenario and checks the outlook against the estimator: an offline fit on
// the daily totals worked out in Go, its cumulative forecasts, and
// Phi from Go's math.Erfc (Phi(x) = erfc(-x / sqrt 2) / 2).
func TestBudgetRecipes(t *testing.T) {
	t.Parallel()
	pool, _ := newDB(t)
	ctx := context.Background()
	recipes, order := readRecipes(t, "../sql/budgets.sql")
	for _, want := range []string{"budgets_table", "budget_outlook", "this_period", "rollup"} {
		if _, ok := recipes[want]; !ok {
			t.Fatalf("sql/budgets.sql has no recipe %q (has %v)", want, order)
		}
	}

	exec(t, pool, `CREATE TABLE fuel_purchases (id bigserial PRIMARY KEY, bought_at timestamptz, depot text, cost numeric)`)
	exec(t, pool, `SELECT sidetrend.track('fuel_purchases', 'bought_at', 'cost', '{depot}', name => 'fuel',
		period => 7, harmonics => 1, lambda => 0.97, horizon => 60)`)
	spec := estimator.Spec{Degree: 1, Period: 7, Harmonics: 1, Lambda: 0.97}
	const horizon = 60
	rows, sums := fuelRows(rand.New(rand.NewPCG(1, 1)))
	for i := 0; i < len(rows); i += 200 {
		insertFuel(t, pool, rows[i:min(i+200, len(rows))])
	}
	s := NewSyncer(pool, nil)
	// The clock is inside 18 March: that day's bucket is open, 17 March is
	// the newest folded one.
	s.now = func() time.Time { return time.Date(2026, 3, 18, 15, 0, 0, 0, time.UTC) }
	if err := s.CatchUp(ctx); err != nil {
		t.Fatal(err)
	}

	day := func(y int, m time.Month, d int) int64 { return dayIndex(time.Date(y, m, d, 0, 0, 0, 0, time.UTC)) }
	folded := day(2026, 3, 17)
	type want struct {
		state                        string
		observed, remaining          int64
		actual, fcRest, proj, lo, hi float64
		sd, p                        float64
		note                         bool
	}
	wants := map[string]want{}
	type period struct {
		kind  string
		start time.Time
		first int64 // first bucket of the period
		end   int64 // one past its last bucket
	}
	periods := []period{
		{"month", time.Date(2026, 2, 1, 0, 0, 0, 0, time.UTC), day(2026, 2, 1), day(2026, 3, 1)},
		{"month", time.Date(2026, 3, 1, 0, 0, 0, 0, time.UTC), day(2026, 3, 1), day(2026, 4, 1)},
		{"month", time.Date(2026, 4, 1, 0, 0, 0, 0, time.UTC), day(2026, 4, 1), day(2026, 5, 1)},
		{"quarter", time.Date(2026, 1, 1, 0, 0, 0, 0, time.UTC), day(2026, 1, 1), day(2026, 4, 1)},
		{"year", time.Date(2026, 1, 1, 0, 0, 0, 0, time.UTC), day(2026, 1, 1), day(2027, 1, 1)},
	}
	key := func(depot, kind string, start time.Time) string {
		return depot + "|" + kind + "|" + start.Format("2006-01-02")
	}
	budgets := map[string]float64{}
	fcs := map[string]*estimator.Forecast{}
	for di, dp := range fuelDepots {
		first := int64(math.MaxInt64)
		for b := range sums[dp.name] {
			first = min(first, b)
		}
		ys := make([]float64, 0, folded-first+1)
		for b := first; b <= folded; b++ {
			ys = append(ys, sums[dp.name][b]) // a day without purchases is 0
		}
		st, err := estimator.Fit(spec, ys)
		if err != nil {
			t.Fatal(err)
		}
		fc, err := st.Forecast(horizon)
		if err != nil {
			t.Fatal(err)
		}
		fcs[dp.name] = fc
		for _, pr := range periods {
			w := want{}
			for b := max(pr.first, first); b < pr.end && b <= folded; b++ {
				w.actual += sums[dp.name][b]
			}
			w.observed = max(0, min(pr.end, folded+1)-pr.first)
			w.remaining = max(0, pr.end-max(pr.first, folded+1))
			h := pr.end - 1 - folded // horizon of the period's last bucket
			switch {
			case folded >= pr.end-1:
				w.state, w.proj, w.lo, w.hi, w.fcRest = "closed", w.actual, w.actual, w.actual, 0
			case folded+1 >= pr.first && h <= horizon:
				w.state = "current"
				w.fcRest = fc.CumForecast[h-1]
				w.proj = w.actual + w.fcRest
				w.lo, w.hi = w.actual+fc.CumLower95[h-1], w.actual+fc.CumUpper95[h-1]
				// 1.959963984540054 = the 0.975 quantile of the standard
				// normal, as in the recipe's header.
				w.sd = (fc.CumUpper95[h-1] - fc.CumLower95[h-1]) / (2 * 1.959963984540054)
			case folded+1 >= pr.first:
				w.state, w.note = "current", true
				w.proj, w.lo, w.hi, w.sd, w.fcRest = math.NaN(), math.NaN(), math.NaN(), math.NaN(), math.NaN()
			default:
				w.state, w.note = "future", true
				w.proj = 0
				for l := pr.first - folded; l <= h; l++ {
					w.proj += fc.Forecast[l-1]
				}
				w.lo, w.hi, w.sd, w.fcRest = math.NaN(), math.NaN(), math.NaN(), math.NaN()
			}
			// Budgets 3 % below, at, and 3 % above the projection (by depot),
			// rounded to cents as a finance team would type them; the year
			// gets a round figure since there is no projection.
			budget := math.Round(w.proj*(0.97+0.03*float64(di))*100) / 100
			if math.IsNaN(budget) {
				budget = 400000
			}
			budgets[key(dp.name, pr.kind, pr.start)] = budget
			switch w.state {
			case "closed":
				w.p = 0
				if w.actual < budget {
					w.p = 1
				}
			case "current":
				w.p = math.NaN()
				if !math.IsNaN(w.sd) {
					w.p = 0.5 * math.Erfc(-(budget-w.proj)/w.sd/math.Sqrt2)
				}
			default:
				w.p = math.NaN()
			}
			wants[key(dp.name, pr.kind, pr.start)] = w
		}
	}

	for _, name := range []string{"budgets_table", "budget_outlook"} {
		exec(t, pool, recipes[name])
	}
	for k, b := range budgets {
		parts := strings.Split(k, "|")
		exec(t, pool, `INSERT INTO budgets (tracker, cost_centre, period, period_start, amount) VALUES ('fuel', $1, $2, $3::date, $4)`,
			parts[0], parts[1], parts[2], b)
	}

	rs, err := pool.Query(ctx, `SELECT cost_centre, period, period_start::timestamp, state, buckets_observed, buckets_remaining,
		actual_to_date, forecast_remaining, projected, lower95, upper95, sd, p_below_budget, note FROM budget_outlook`)
	if err != nil {
		t.Fatal(err)
	}
	seen := 0
	for rs.Next() {
		var depot, kind, state string
		var start time.Time
		var observed, remaining int64
		var actual float64
		var fcRest, proj, lo, hi, sd, p *float64
		var note *string
		if err := rs.Scan(&depot, &kind, &start, &state, &observed, &remaining, &actual, &fcRest, &proj, &lo, &hi, &sd, &p, &note); err != nil {
			t.Fatal(err)
		}
		k := key(depot, kind, start)
		w, ok := wants[k]
		if !ok {
			t.Errorf("outlook row %s not among the budgets", k)
			continue
		}
		seen++
		if state != w.state || observed != w.observed || remaining != w.remaining {
			t.Errorf("%s: state %s, %d observed, %d remaining; want %s, %d, %d", k, state, observed, remaining, w.state, w.observed, w.remaining)
		}
		if (note != nil) != w.note {
			t.Errorf("%s: note %q, want a note: %v", k, strings.Join(nonNil(note), ""), w.note)
		}
		// Relative 1e-9: the database adds the bucket sums in another order
		// than Go (see compareForecasts).
		near := func(name string, g *float64, wv float64, abs float64) {
			if math.IsNaN(wv) {
				if g != nil {
					t.Errorf("%s %s = %v, want NULL", k, name, *g)
				}
				return
			}
			if g == nil || !scalar.EqualWithinAbsOrRel(*g, wv, abs, 1e-9) {
				t.Errorf("%s %s = %v, want %v", k, name, deref2(g), wv)
			}
		}
		near("actual_to_date", &actual, w.actual, 1e-9)
		near("forecast_remaining", fcRest, w.fcRest, 1e-9)
		near("projected", proj, w.proj, 1e-9)
		near("lower95", lo, w.lo, 1e-9)
		near("upper95", hi, w.hi, 1e-9)
		near("sd", sd, w.sd, 1e-9)
		// Absolute 1e-9 on a probability: sidetrend.normal_cdf is good to
		// about 1e-15, the rest is the inputs' last digits.
		near("p_below_budget", p, w.p, 1e-9)
	}
	if err := rs.Err(); err != nil {
		t.Fatal(err)
	}
	if seen != len(wants) {
		t.Errorf("outlook has %d rows, want %d", seen, len(wants))
	}
	// The scenario covers every kind of period.
	states := map[string]int{}
	for _, w := range wants {
		states[w.state]++
	}
	if states["closed"] == 0 || states["current"] == 0 || states["future"] == 0 {
		t.Fatalf("scenario has states %v: want closed, current and future periods", states)
	}

	// this_period lists the periods under way.
	var current int
	if err := pool.QueryRow(ctx, `SELECT count(*) FROM (`+strings.TrimRight(strings.TrimSpace(recipes["this_period"]), ";")+`) q`).Scan(&current); err != nil {
		t.Fatal(err)
	}
	if current != states["current"] {
		t.Errorf("this_period lists %d periods, want %d", current, states["current"])
	}

	// The rollup of March: totals, both intervals, p under independence.
	march := time.Date(2026, 3, 1, 0, 0, 0, 0, time.UTC)
	var wBudget, wProj, wVar, wLo, wHi float64
	for _, dp := range fuelDepots {
		k := key(dp.name, "month", march)
		w := wants[k]
		wBudget += budgets[k]
		wProj += w.proj
		wVar += w.sd * w.sd
		wLo += w.lo
		wHi += w.hi
	}
	wSD := math.Sqrt(wVar)
	wP := 0.5 * math.Erfc(-(wBudget-wProj)/wSD/math.Sqrt2)
	rollup := strings.TrimRight(strings.TrimSpace(recipes["rollup"]), ";")
	var n int
	var gBudget, gProj, gSD, gLoI, gHiI, gLo, gHi, gP float64
	if err := pool.QueryRow(ctx, `SELECT cost_centres, budget, projected, sd_independent, lower95_independent, upper95_independent,
		lower95_sum_of_bounds, upper95_sum_of_bounds, p_below_budget_independent FROM (`+rollup+`) r
		WHERE tracker = 'fuel' AND period = 'month' AND period_start = '2026-03-01'`).
		Scan(&n, &gBudget, &gProj, &gSD, &gLoI, &gHiI, &gLo, &gHi, &gP); err != nil {
		t.Fatal(err)
	}
	for _, c := range []struct {
		name      string
		got, want float64
	}{
		{"budget", gBudget, wBudget}, {"projected", gProj, wProj}, {"sd_independent", gSD, wSD},
		{"lower95_independent", gLoI, wProj - 1.959963984540054*wSD}, {"upper95_independent", gHiI, wProj + 1.959963984540054*wSD},
		{"lower95_sum_of_bounds", gLo, wLo}, {"upper95_sum_of_bounds", gHi, wHi}, {"p_below_budget_independent", gP, wP},
	} {
		if !scalar.EqualWithinAbsOrRel(c.got, c.want, 1e-9, 1e-9) {
			t.Errorf("rollup of March %s = %v, want %v", c.name, c.got, c.want)
		}
	}
	if n != len(fuelDepots) {
		t.Errorf("rollup of March has %d cost centres, want %d", n, len(fuelDepots))
	}
	// The independent interval is never wider than the sum of the bounds.
	if gHiI-gLoI > gHi-gLo {
		t.Errorf("independent interval %v..%v is wider than the sum of bounds %v..%v", gLoI, gHiI, gLo, gHi)
	}
}

func insertFuel(t *testing.T, pool *pgxpool.Pool, rows [][]any) {
	t.Helper()
	if len(rows) == 0 {
		return
	}
	var sb strings.Builder
	args := make([]any, 0, 3*len(rows))
	sb.WriteString("INSERT INTO fuel_purchases (bought_at, depot, cost) VALUES ")
	for i, r := range rows {
		if i > 0 {
			sb.WriteString(", ")
		}
		fmt.Fprintf(&sb, "($%d, $%d, $%d)", 3*i+1, 3*i+2, 3*i+3)
		args = append(args, r...)
	}
	if _, err := pool.Exec(context.Background(), sb.String(), args...); err != nil {
		t.Fatal(err)
	}
}

func nonNil(s *string) []string {
	if s == nil {
		return nil
	}
	return []string{*s}
}
