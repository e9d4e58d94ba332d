package main

import (
	"context"
	"net"
	"os"
	"os/exec"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/urfave/cli/v2"
	"gonum.org/v1/gonum/floats/scalar"

	"github.com/sidetrend/sidetrend/estimator"
	"github.com/sidetrend/sidetrend/pgsync"
	"github.com/sidetrend/sidetrend/sqlwire"
)

// TestLiveEndpointOnStoredState serves the sidecar's real stored state
// (tracked table, drained, folded) through the live endpoint, attaches it
// with stock postgres_fdw via sql/foreign.sql, and reads a 400-bucket
// forecast and a what-if lambda back through plain SQL.
func TestLiveEndpointOnStoredState(t *testing.T) {
	url, pool := salesDB(t)
	ctx := context.Background()
	const password = "tea-and-gears" // made up for the test
	srv := sqlwire.New(sqlwire.Config{Listen: "127.0.0.1:0", Credentials: map[string]string{"sidetrend": password}},
		liveSource{pool: pool}, pool, nil)
	if err := srv.Start(ctx); err != nil {
		t.Fatal(err)
	}
	defer srv.Stop()
	port := srv.Addr().(*net.TCPAddr).Port
	psql, err := exec.LookPath("psql")
	if err != nil {
		t.Fatalf("psql is not on PATH: %v", err)
	}
	cmd := exec.Command(psql, "-X", "-q", "-d", url, "-v", "ON_ERROR_STOP=1", "-v", "host=127.0.0.1",
		"-v", "port="+strconv.Itoa(port), "-v", "user=sidetrend", "-v", "password="+password, "-f", "../../sql/foreign.sql")
	cmd.Env = append(os.Environ(), "PGCONNECT_TIMEOUT=20")
	if out, err := cmd.CombinedOutput(); err != nil {
		t.Fatalf("psql -f sql/foreign.sql: %v\n%s", err, out)
	}

	d, err := pgsync.LoadSeries(ctx, pool, "sales", "north")
	if err != nil {
		t.Fatal(err)
	}
	stored, err := estimator.DecodeFor(d.State, d.Spec)
	if err != nil {
		t.Fatal(err)
	}
	whatIf := d.Spec
	whatIf.Lambda = 0.8
	refit, err := estimator.Fit(whatIf, d.Values)
	if err != nil {
		t.Fatal(err)
	}
	for _, c := range []struct {
		name  string
		sql   string
		state *estimator.State
	}{
		{"stored state", `SELECT horizon, forecast, lower95, upper95 FROM sidetrend_live.forecast
			WHERE tracker = 'sales' AND series_key = 'north' AND horizon <= 400 ORDER BY horizon`, stored},
		{"what-if lambda 0.8", `SELECT horizon, forecast, lower95, upper95 FROM sidetrend_live.forecast
			WHERE tracker = 'sales' AND series_key = 'north' AND lambda = 0.8 AND horizon <= 400 ORDER BY horizon`, refit},
	} {
		fc, err := c.state.Forecast(400)
		if err != nil {
			t.Fatal(err)
		}
		rows, err := pool.Query(ctx, c.sql)
		if err != nil {
			t.Fatalf("%s: %v", c.name, err)
		}
		type row struct {
			H                int
			Forecast, Lo, Hi float64
		}
		got, err := pgx.CollectRows(rows, pgx.RowToStructByPos[row])
		if err != nil {
			t.Fatalf("%s: %v", c.name, err)
		}
		if len(got) != 400 {
			t.Fatalf("%s: %d rows, want 400", c.name, len(got))
		}
		for i, r := range got {
			// Same estimator, same state: equal up to the float8 text
			// round trip through postgres_fdw (exact with extra_float_digits 3).
			for _, v := range [][2]float64{{r.Forecast, fc.Forecast[i]}, {r.Lo, fc.Lower95[i]}, {r.Hi, fc.Upper95[i]}} {
				if !scalar.EqualWithinAbsOrRel(v[0], v[1], 0, 1e-15) {
					t.Fatalf("%s: horizon %d: %v, want %v", c.name, r.H, v[0], v[1])
				}
			}
		}
	}
	// How far a horizon reaches: the same data_buckets and reach as the
	// sidetrend.forecasts view, whose rows stop at the tracker's horizon.
	var span int64
	var viewReach, liveReach float64
	if err := pool.QueryRow(ctx, `SELECT v.data_buckets, v.reach, l.reach FROM sidetrend.forecasts v
		JOIN sidetrend_live.forecast l ON l.tracker = v.tracker AND l.series_key = v.series_key AND l.horizon = v.horizon
		WHERE v.tracker = 'sales' AND v.series_key = 'north' AND v.horizon = 3 AND l.data_buckets = v.data_buckets`).
		Scan(&span, &viewReach, &liveReach); err != nil {
		t.Fatalf("data_buckets and reach of the live forecast against the view: %v", err)
	}
	if span < 1 || liveReach != viewReach {
		t.Errorf("live reach %v, view reach %v over %d buckets", liveReach, viewReach, span)
	}
	if err := pool.QueryRow(ctx, `SELECT reach FROM sidetrend_live.forecast
		WHERE tracker = 'sales' AND series_key = 'north' AND horizon = $1`, 2*span).Scan(&liveReach); err != nil || liveReach != 2 {
		t.Errorf("reach at twice the history: %v (err %v), want 2", liveReach, err)
	}
	var n int64
	if err := pool.QueryRow(ctx, `SELECT n_errors FROM sidetrend_live.backtest
		WHERE tracker = 'sales' AND series_key = 'north' AND lambda = 0.9`).Scan(&n); err != nil {
		t.Fatal(err)
	}
	spec := d.Spec
	spec.Lambda = 0.9
	es, err := estimator.Backtest(spec, d.Values)
	if err != nil {
		t.Fatal(err)
	}
	if n != es.N {
		t.Errorf("backtest n_errors %d, want %d", n, es.N)
	}
}

// liveConfigFrom parses the live endpoint's flags as run does.
func liveConfigFrom(t *testing.T, args ...string) (sqlwire.Config, error) {
	t.Helper()
	var cfg sqlwire.Config
	var cfgErr error
	app := &cli.App{Name: "x", Flags: liveLimitFlags(), Action: func(c *cli.Context) error {
		cfg, cfgErr = liveConfig(c)
		return nil
	}}
	if err := app.Run(append([]string{"x"}, args...)); err != nil {
		t.Fatal(err)
	}
	return cfg, cfgErr
}

// TestLiveLimitFlags: the flags and SIDETREND_SQL_* variables reach
// sqlwire.Limits, the defaults are sqlwire's, and --sql-require-tls
// without a certificate stops the endpoint at Start.
func TestLiveLimitFlags(t *testing.T) {
	cfg, err := liveConfigFrom(t)
	if err != nil {
		t.Fatal(err)
	}
	want := sqlwire.Limits{StatementTimeout: sqlwire.DefaultStatementTimeout, MaxInList: sqlwire.DefaultMaxInList,
		MaxRows: sqlwire.DefaultMaxRows, MaxStatementMemory: sqlwire.DefaultMaxStatementMemory,
		MaxMessageSize: sqlwire.DefaultMaxMessageSize, MaxUnauthenticated: sqlwire.DefaultMaxUnauthenticated,
		AuthFailureDelay: sqlwire.DefaultAuthFailureDelay, AuthFailureMaxDelay: sqlwire.DefaultAuthFailureMaxDelay}
	if cfg.Limits != want || cfg.RequireTLS || cfg.MaxConnections != 200 {
		t.Errorf("defaults: %+v, want %+v", cfg, want)
	}

	t.Setenv("SIDETREND_SQL_MAX_ROWS", "5000")
	t.Setenv("SIDETREND_SQL_REQUIRE_TLS", "true")
	cfg, err = liveConfigFrom(t, "--sql-statement-timeout", "2s", "--sql-max-statement-memory-mb", "3",
		"--sql-max-message-kb", "64", "--sql-max-in-list", "7", "--sql-max-unauthenticated", "9",
		"--sql-auth-failure-delay", "1s", "--sql-auth-failure-max-delay", "8s")
	if err != nil {
		t.Fatal(err)
	}
	want = sqlwire.Limits{StatementTimeout: 2 * time.Second, MaxInList: 7, MaxRows: 5000, MaxStatementMemory: 3 << 20,
		MaxMessageSize: 64 << 10, MaxUnauthenticated: 9, AuthFailureDelay: time.Second, AuthFailureMaxDelay: 8 * time.Second}
	if cfg.Limits != want || !cfg.RequireTLS {
		t.Errorf("set: %+v, want %+v and RequireTLS", cfg, want)
	}
	cfg.Listen, cfg.Credentials = "127.0.0.1:0", map[string]string{"sidetrend": "x"}
	err = sqlwire.New(cfg, liveSource{}, nil, nil).Start(context.Background())
	if err == nil || !strings.Contains(err.Error(), "TLS is required but no certificate") {
		t.Errorf("--sql-require-tls without --tls-cert: %v", err)
	}

	for _, bad := range [][]string{{"--sql-max-in-list", "0"}, {"--sql-max-rows", "-1"}, {"--sql-statement-timeout", "0s"}} {
		if _, err := liveConfigFrom(t, bad...); err == nil || !strings.Contains(err.Error(), bad[0]) {
			t.Errorf("%v: %v, want an error naming the flag", bad, err)
		}
	}
}
