package sqlwire

import (
	"context"
	"fmt"
	"math/rand/v2"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"
)

// TestGeneratedQueries runs a seeded stream of queries of the shapes
// postgres_fdw pushes down (conditions, ORDER BY, aggregates, LIMIT,
// joins, parameters, cursors) through the foreign tables, and the same
// query over the same rows copied into local tables, and compares the
// answers row for row. The local copy holds the stored-fit forecasts for
// horizons 1..12, the backtests for three lambdas and the series list.
func TestGeneratedQueries(t *testing.T) {
	t.Parallel()
	ctx := testCtx(t, 5*time.Minute)
	f := newFixture(t, newMemSource(t, scenarioSeries()))
	f.exec(t, ctx, f.adminURL, `
CREATE SCHEMA copied;
CREATE TABLE copied.forecast AS SELECT * FROM sidetrend_live.forecast WHERE horizon <= 12;
CREATE TABLE copied.backtest AS SELECT * FROM sidetrend_live.backtest WHERE lambda IN (0.8, 0.9, 0.95);
CREATE TABLE copied.series AS SELECT * FROM sidetrend_live.series;
GRANT USAGE ON SCHEMA copied TO sidetrend_reader;
GRANT SELECT ON ALL TABLES IN SCHEMA copied TO sidetrend_reader;`)
	conn := f.analyst(t, ctx)
	var copied int64
	if err := conn.QueryRow(ctx, "SELECT count(*) FROM copied.forecast").Scan(&copied); err != nil || copied < 40 {
		t.Fatalf("copied %d forecast rows: %v", copied, err)
	}

	r := rand.New(rand.NewPCG(19, 500))
	const n = 520
	shapes := map[string]int{}
	for i := range n {
		q := generateQuery(r)
		shapes[q.shape]++
		remote, err := runGenerated(ctx, conn, q, "sidetrend_live")
		if err != nil {
			t.Fatalf("query %d (%s) through the endpoint: %v\n%s %v", i, q.shape, err, q.sql, q.args)
		}
		local, err := runGenerated(ctx, conn, q, "copied")
		if err != nil {
			t.Fatalf("query %d (%s) over the copy: %v\n%s %v", i, q.shape, err, q.sql, q.args)
		}
		if !q.ordered {
			slices.Sort(remote)
			slices.Sort(local)
		}
		if !slices.Equal(remote, local) {
			t.Errorf("query %d (%s) differs:\n%s %v\nendpoint (%d rows): %.400v\ncopy (%d rows):     %.400v",
				i, q.shape, strings.ReplaceAll(q.sql, "{s}", "sidetrend_live"), q.args, len(remote), remote, len(local), local)
		}
	}
	t.Logf("%d queries: %v", n, shapes)
}

type genQuery struct {
	shape   string
	sql     string // {s} stands for the schema
	args    []any
	ordered bool // ORDER BY makes the order part of the answer
	cursor  bool // read through DECLARE and FETCH 3 at a time
	generic bool // force generic plans, so postgres_fdw sends $n
}

var cursorSeq int

// runGenerated runs q with the tables of schema and returns each row as
// the text of its values.
func runGenerated(ctx context.Context, conn *pgx.Conn, q genQuery, schema string) ([]string, error) {
	sql := strings.ReplaceAll(q.sql, "{s}", schema)
	mode := "auto"
	if q.generic {
		mode = "force_generic_plan"
	}
	if _, err := conn.Exec(ctx, "SET plan_cache_mode = "+mode); err != nil {
		return nil, err
	}
	collect := func(rows pgx.Rows) ([]string, error) {
		var out []string
		for rows.Next() {
			vals, err := rows.Values()
			if err != nil {
				return nil, err
			}
			out = append(out, fmt.Sprint(vals...))
		}
		return out, rows.Err()
	}
	if !q.cursor {
		rows, err := conn.Query(ctx, sql, q.args...)
		if err != nil {
			return nil, err
		}
		return collect(rows)
	}
	tx, err := conn.Begin(ctx)
	if err != nil {
		return nil, err
	}
	defer tx.Rollback(ctx)
	// A new cursor name each time: pgx caches what FETCH returns by its text.
	cursorSeq++
	name := fmt.Sprintf("g%d", cursorSeq)
	if _, err := tx.Exec(ctx, "DECLARE "+name+" NO SCROLL CURSOR FOR "+sql, q.args...); err != nil {
		return nil, err
	}
	var out []string
	for {
		rows, err := tx.Query(ctx, "FETCH 3 FROM "+name)
		if err != nil {
			return nil, err
		}
		part, err := collect(rows)
		if err != nil {
			return nil, err
		}
		out = append(out, part...)
		if len(part) < 3 {
			return out, nil
		}
	}
}

func pick[T any](r *rand.Rand, xs ...T) T { return xs[r.IntN(len(xs))] }

// generateQuery draws one query.
func generateQuery(r *rand.Rand) genQuery {
	q := genQuery{cursor: r.IntN(5) == 0, generic: r.IntN(4) == 0}
	switch r.IntN(10) {
	case 0, 1, 2, 3:
		q.shape = "forecast"
		forecastQuery(r, &q)
	case 4, 5:
		q.shape = "forecast aggregate"
		forecastAggregate(r, &q)
	case 6:
		q.shape = "backtest"
		backtestQuery(r, &q)
	case 7:
		q.shape = "series"
		seriesQuery(r, &q)
	default:
		q.shape = "join"
		joinQuery(r, &q)
	}
	return q
}

// arg adds a parameter and returns its placeholder.
func (q *genQuery) arg(v any) string {
	q.args = append(q.args, v)
	return fmt.Sprintf("$%d", len(q.args))
}

// horizonBound is the condition every forecast query needs, within the
// copied 12 horizons.
func horizonBound(r *rand.Rand, q *genQuery, col string) string {
	h := 1 + r.IntN(12)
	switch r.IntN(6) {
	case 0:
		return fmt.Sprintf("%s <= %s", col, q.arg(h))
	case 1:
		lo := 1 + r.IntN(h)
		return fmt.Sprintf("%s BETWEEN %d AND %d", col, lo, h)
	case 2:
		return fmt.Sprintf("%s IN (%d, %d, %d)", col, 1+r.IntN(12), 1+r.IntN(12), 1+r.IntN(12))
	case 3:
		return fmt.Sprintf("%s < %d.5", col, h)
	case 4:
		return fmt.Sprintf("(%s = %d OR %s <= %d)", col, 1+r.IntN(12), col, h)
	}
	return fmt.Sprintf("%s <= %d", col, h)
}

func forecastCondition(r *rand.Rand, q *genQuery, p string) string {
	switch r.IntN(16) {
	case 0:
		if r.IntN(3) == 0 {
			return fmt.Sprintf("%stracker = %s", p, q.arg("bakery_sales"))
		}
		return fmt.Sprintf("%stracker = %s", p, pick(r, "'bakery_sales'", "'cold_store_kwh'"))
	case 1:
		return fmt.Sprintf("%sseries_key IN ('market', 'harbour', 'nowhere')", p)
	case 2:
		return fmt.Sprintf("%sseries_key LIKE '%s%%'", p, pick(r, "h", "s", "m"))
	case 3:
		return fmt.Sprintf("%sforecast > %d", p, pick(r, 40, 100, 200, 300))
	case 4:
		return fmt.Sprintf("%slower95 < %s", p, q.arg(float64(pick(r, 50, 150, 250))))
	case 5:
		return fmt.Sprintf("%supper80 IS NOT NULL", p)
	case 6:
		return fmt.Sprintf("%speriod_start >= '2025-07-0%d 00:00:00+00'", p, 1+r.IntN(6))
	case 7:
		return fmt.Sprintf("(%supper95 - %slower95) > %d", p, p, pick(r, 5, 20, 60))
	case 8:
		return fmt.Sprintf("abs(%scum_forecast / %shorizon - %sforecast) < %d", p, p, p, pick(r, 5, 20))
	case 9:
		return fmt.Sprintf("%shorizon %% 2 = %d", p, r.IntN(2))
	case 10:
		return fmt.Sprintf("NOT (%sseries_key = 'station')", p)
	case 11:
		return fmt.Sprintf("coalesce(%slower80, 0) < %d", p, pick(r, 100, 300))
	case 12:
		return fmt.Sprintf("%stracker <> 'cold_store_kwh'", p)
	case 13:
		return fmt.Sprintf("upper(%sseries_key) = 'MARKET'", p)
	case 14:
		return fmt.Sprintf("round(%sforecast::numeric, 1) >= %d.5", p, pick(r, 40, 120, 330))
	}
	return fmt.Sprintf("%sseries_key = ANY (ARRAY['market', 'station', %s])", p, q.arg("hall_a"))
}

func conditions(r *rand.Rand, q *genQuery, p string, gen func(*rand.Rand, *genQuery, string) string) string {
	var cs []string
	for range r.IntN(3) {
		c := gen(r, q, p)
		if r.IntN(6) == 0 {
			c = "(" + c + " OR " + gen(r, q, p) + ")"
		}
		cs = append(cs, c)
	}
	if len(cs) == 0 {
		return ""
	}
	return " AND " + strings.Join(cs, " AND ")
}

// forecastKey orders forecast rows totally.
const forecastKey = "tracker, series_key, lambda, horizon"

func forecastQuery(r *rand.Rand, q *genQuery) {
	cols := pick(r, "*", "tracker, series_key, horizon, forecast", "series_key, horizon, lower95, upper95, period_start",
		"tracker, series_key, lambda, horizon, cum_forecast, cum_lower95")
	q.sql = fmt.Sprintf("SELECT %s FROM {s}.forecast WHERE %s%s", cols, horizonBound(r, q, "horizon"), conditions(r, q, "", forecastCondition))
	switch r.IntN(4) {
	case 0:
		q.ordered = true
		q.sql += " ORDER BY " + pick(r, "forecast DESC", "horizon", "upper95 - lower95 DESC NULLS FIRST", "period_start") + ", " + forecastKey
		if r.IntN(2) == 0 {
			q.sql += fmt.Sprintf(" LIMIT %d", 1+r.IntN(10))
			if r.IntN(2) == 0 {
				q.sql += fmt.Sprintf(" OFFSET %d", r.IntN(4))
			}
		}
	case 1:
		q.ordered = true
		q.sql += " ORDER BY " + forecastKey + " DESC"
	}
	if cols != "*" && !strings.Contains(cols, "lambda") && q.ordered {
		q.sql = strings.Replace(q.sql, "SELECT "+cols, "SELECT "+cols+", lambda", 1)
	}
}

func forecastAggregate(r *rand.Rand, q *genQuery) {
	aggs := pick(r, "count(*)", "count(*), min(forecast), max(upper95)", "sum(round(forecast::numeric, 6)), count(lower80)",
		"min(period_start), max(horizon), avg(horizon)", "count(DISTINCT series_key)", "bool_and(forecast > lower95)",
		"sum(round(cum_forecast::numeric, 3)) FILTER (WHERE horizon > 3)")
	where := fmt.Sprintf("%s%s", horizonBound(r, q, "horizon"), conditions(r, q, "", forecastCondition))
	switch r.IntN(3) {
	case 0:
		q.sql = fmt.Sprintf("SELECT %s FROM {s}.forecast WHERE %s", aggs, where)
	case 1:
		q.ordered = true
		q.sql = fmt.Sprintf("SELECT series_key, %s FROM {s}.forecast WHERE %s GROUP BY series_key ORDER BY series_key", aggs, where)
	default:
		q.ordered = true
		q.sql = fmt.Sprintf("SELECT tracker, horizon, %s FROM {s}.forecast WHERE %s GROUP BY tracker, horizon HAVING count(*) >= %d ORDER BY 1, 2",
			aggs, where, 1+r.IntN(3))
		if r.IntN(2) == 0 {
			q.sql += fmt.Sprintf(" LIMIT %d", 1+r.IntN(5))
		}
	}
}

func backtestQuery(r *rand.Rand, q *genQuery) {
	lambdas := pick(r, "lambda = 0.9", "lambda IN (0.8, 0.95)", "lambda IN (0.8, 0.9, 0.95)")
	if r.IntN(4) == 0 {
		lambdas = "lambda = " + q.arg(0.95)
	}
	cond := pick(r, "", " AND rmse < 20", " AND tracker = 'bakery_sales'", " AND n_errors > 100", " AND coverage95 IS NOT NULL",
		" AND mape > 0.01")
	switch r.IntN(3) {
	case 0:
		q.sql = fmt.Sprintf("SELECT * FROM {s}.backtest WHERE %s%s", lambdas, cond)
	case 1:
		q.ordered = true
		q.sql = fmt.Sprintf("SELECT tracker, series_key, lambda, rmse FROM {s}.backtest WHERE %s%s ORDER BY rmse NULLS LAST, tracker, series_key, lambda LIMIT %d",
			lambdas, cond, 1+r.IntN(6))
	default:
		q.ordered = true
		q.sql = fmt.Sprintf("SELECT series_key, min(mae), count(*) FROM {s}.backtest WHERE %s%s GROUP BY series_key ORDER BY 1", lambdas, cond)
	}
}

func seriesQuery(r *rand.Rand, q *genQuery) {
	cond := pick(r, "", " WHERE points > 100", " WHERE state = 'ready'", " WHERE period IS NULL", " WHERE last_bucket > '2025-06-01'",
		" WHERE harmonics = 2 AND degree = 1")
	if r.IntN(6) == 0 {
		cond = " WHERE tracker = " + q.arg("bakery_sales")
	}
	switch r.IntN(3) {
	case 0:
		q.sql = "SELECT * FROM {s}.series" + cond
	case 1:
		q.ordered = true
		q.sql = "SELECT tracker, series_key, points FROM {s}.series" + cond + " ORDER BY points DESC, tracker, series_key LIMIT 3"
	default:
		q.sql = "SELECT tracker, count(*), sum(points), max(last_bucket) FROM {s}.series" + cond + " GROUP BY tracker"
	}
}

func joinQuery(r *rand.Rand, q *genQuery) {
	where := fmt.Sprintf("%s%s", horizonBound(r, q, "f.horizon"), conditions(r, q, "f.", forecastCondition))
	kind := pick(r, "JOIN", "LEFT JOIN")
	switch r.IntN(3) {
	case 0:
		q.sql = fmt.Sprintf(`SELECT f.series_key, f.horizon, f.forecast, s.points, s.state FROM {s}.forecast f %s {s}.series s
ON (f.tracker = s.tracker AND f.series_key = s.series_key) WHERE %s`, kind, where)
	case 1:
		q.ordered = true
		q.sql = fmt.Sprintf(`SELECT s.tracker, count(*), max(f.upper95) FROM {s}.series s %s {s}.forecast f
ON (f.tracker = s.tracker AND f.series_key = s.series_key AND %s) GROUP BY s.tracker ORDER BY 1`, kind, where)
	default:
		q.ordered = true
		q.sql = fmt.Sprintf(`SELECT f.series_key, f.horizon, b.lambda, b.rmse FROM {s}.forecast f JOIN {s}.backtest b
ON (f.tracker = b.tracker AND f.series_key = b.series_key) WHERE %s AND b.lambda = 0.9
ORDER BY f.series_key, f.horizon, b.lambda LIMIT %d`, where, 5+r.IntN(20))
	}
}
