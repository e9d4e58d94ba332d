package sqlwire

import (
	"context"
	"fmt"
	"github.com/sidetrend/sidetrend/sqlwire/livetables"
	"testing"
	"time"

	"github.com/sidetrend/sidetrend/estimator"
)

// BenchmarkForecastThroughFDW times a forecast of one series for every
// horizon up to h, end to end: a local SELECT on the test server, pushed by
// postgres_fdw to the endpoint, which computes the forecast from the stored
// state. "aggregate" pushes count and sum down (one row comes back);
// "rows" fetches every horizon's row (fetch_size 1000 from foreign.sql).
func BenchmarkForecastThroughFDW(b *testing.B) {
	ctx, cancel := context.WithTimeout(context.Background(), 10*time.Minute)
	defer cancel()
	f := newFixture(b, newMemSource(b, longSeries(10000, weeklyModel)))
	conn := f.analyst(b, ctx)
	for _, h := range []int{100, 1000, 10000} {
		b.Run(fmt.Sprintf("aggregate/horizon=%d", h), func(b *testing.B) {
			b.ReportAllocs()
			for b.Loop() {
				var n int64
				var sum float64
				if err := conn.QueryRow(ctx, "SELECT count(*), sum(forecast) FROM sidetrend_live.forecast WHERE horizon <= $1", h).Scan(&n, &sum); err != nil || n != int64(h) {
					b.Fatalf("%d rows, %v", n, err)
				}
			}
		})
		b.Run(fmt.Sprintf("rows/horizon=%d", h), func(b *testing.B) {
			b.ReportAllocs()
			for b.Loop() {
				rows, err := conn.Query(ctx, "SELECT horizon, forecast, lower95, upper95 FROM sidetrend_live.forecast WHERE horizon <= $1", h)
				if err != nil {
					b.Fatal(err)
				}
				n := 0
				for rows.Next() {
					n++
				}
				if err := rows.Err(); err != nil || n != h {
					b.Fatalf("%d rows, %v", n, err)
				}
			}
		})
	}
}

// BenchmarkWhatIfRefitThroughFDW times a what-if: the endpoint refits a
// series of n points with another lambda and forecasts 30 buckets; the
// local side sums them. The refit is estimator.Fit over every point (the
// result must equal it bit for bit), so its cost grows with the points and
// with the model's number of parameters p.
func BenchmarkWhatIfRefitThroughFDW(b *testing.B) {
	ctx, cancel := context.WithTimeout(context.Background(), 10*time.Minute)
	defer cancel()
	for _, c := range []struct {
		model string
		spec  estimator.Spec
		n     int
	}{
		{"linear", linearModel, 1000}, {"linear", linearModel, 10000},
		{"weekly", weeklyModel, 1000}, {"weekly", weeklyModel, 10000},
	} {
		b.Run(fmt.Sprintf("model=%s/p=%d/points=%d", c.model, c.spec.Params(), c.n), func(b *testing.B) {
			f := newFixture(b, newMemSource(b, longSeries(c.n, c.spec)))
			conn := f.analyst(b, ctx)
			b.ReportAllocs()
			for b.Loop() {
				var sum float64
				if err := conn.QueryRow(ctx, "SELECT sum(forecast) FROM sidetrend_live.forecast WHERE lambda = 0.9 AND horizon <= 30").Scan(&sum); err != nil {
					b.Fatal(err)
				}
			}
		})
	}
}

// BenchmarkFit is estimator.Fit alone on the series of the what-if
// benchmark, to tell the endpoint's share from the refit's.
func BenchmarkFit(b *testing.B) {
	for _, c := range []struct {
		model string
		spec  estimator.Spec
	}{{"linear", linearModel}, {"weekly", weeklyModel}} {
		b.Run(fmt.Sprintf("model=%s/p=%d/points=10000", c.model, c.spec.Params()), func(b *testing.B) {
			s := newMemSource(b, longSeries(10000, c.spec)).series[0]
			spec := s.info.Spec
			spec.Lambda = 0.9
			b.ReportAllocs()
			for b.Loop() {
				if _, err := estimator.Fit(spec, s.values); err != nil {
					b.Fatal(err)
				}
			}
		})
	}
}

// fdwCursor is the statement postgres_fdw sends for a typical forecast
// query with a what-if lambda.
const fdwCursor = `DECLARE c1 CURSOR FOR
SELECT tracker, series_key, lambda, horizon, forecast, lower95, upper95 FROM sidetrend_live.forecast WHERE ((tracker = 'bakery_sales'::text)) AND ((horizon <= 30)) AND ((lambda = ANY ('{0.8,0.9}'::double precision[]))) ORDER BY horizon ASC NULLS LAST LIMIT 10::bigint`

// BenchmarkParse is Postgres' grammar (WebAssembly) and the whitelist on
// the statement above, and the same text from the parse cache; deparse
// writes the tree back as the evaluation query (once per statement and
// number of parameters: evalSQL keeps it).
func BenchmarkParse(b *testing.B) {
	warmGrammar()
	b.Run("parse", func(b *testing.B) {
		b.ReportAllocs()
		for b.Loop() {
			if _, err := parseUncached(fdwCursor); err != nil {
				b.Fatal(err)
			}
		}
	})
	b.Run("cached", func(b *testing.B) {
		b.ReportAllocs()
		for b.Loop() {
			if _, err := parseStatement(fdwCursor); err != nil {
				b.Fatal(err)
			}
		}
	})
	st, _ := parseStatement(fdwCursor)
	q := statementQuery(st)
	b.Run("deparse", func(b *testing.B) {
		b.ReportAllocs()
		for b.Loop() {
			if _, err := deparse(q, 0); err != nil {
				b.Fatal(err)
			}
		}
	})
}

// BenchmarkRoundTrip is what Postgres' evaluation adds to a statement:
// the bounds query when a constant is not a plain literal (here the
// array), and the evaluation of the query over the computed rows, each one
// round trip to the test server (3 series x 2 lambdas x 30 horizons computed).
func BenchmarkRoundTrip(b *testing.B) {
	ctx := context.Background()
	warmGrammar()
	st, _ := parseStatement(fdwCursor)
	q := statementQuery(st)
	ev := &evaluator{pool: evalPool(b)}
	set := newSettings("bench")
	lim := Limits{}.withDefaults()
	src := newMemSource(b, scenarioSeries())
	b.Run("bounds", func(b *testing.B) {
		b.ReportAllocs()
		for b.Loop() {
			if _, err := newPushdown(q, nil, &lim).domains(ctx, ev, set); err != nil {
				b.Fatal(err)
			}
		}
	})
	doms, err := newPushdown(q, nil, &lim).domains(ctx, ev, set)
	if err != nil {
		b.Fatal(err)
	}
	rs, err := livetables.Forecast.Scan(ctx, src, doms[q.rels[0]], q.rels[0].used, nil)
	if err != nil || rs.N == 0 {
		b.Fatalf("%v rows, %v", rs.N, err)
	}
	b.Run("evaluate", func(b *testing.B) {
		b.ReportAllocs()
		for b.Loop() {
			if _, err := ev.run(ctx, q, nil, []*livetables.Rows{rs}, set, newBudget(&lim)); err != nil {
				b.Fatal(err)
			}
		}
	})
}
