package main

import (
	"bufio"
	"context"
	"errors"
	"io"
	"log/slog"
	"net"
	"net/http"
	"net/http/httptest"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/sidetrend/sidetrend/pgsync"
)

// get fetches url and returns the status code and body.
func get(t *testing.T, url string) (int, string) {
	t.Helper()
	resp, err := http.Get(url)
	if err != nil {
		t.Fatalf("GET %s: %v", url, err)
	}
	defer resp.Body.Close()
	b, err := io.ReadAll(resp.Body)
	if err != nil {
		t.Fatalf("GET %s: %v", url, err)
	}
	return resp.StatusCode, string(b)
}

// metricValue finds the sample named series (with its labels, as the text
// format prints them) in a /metrics body.
func metricValue(t *testing.T, body, series string) float64 {
	t.Helper()
	sc := bufio.NewScanner(strings.NewReader(body))
	for sc.Scan() {
		name, val, ok := strings.Cut(sc.Text(), " ")
		if ok && name == series {
			v, err := strconv.ParseFloat(val, 64)
			if err != nil {
				t.Fatalf("%s: %v", series, err)
			}
			return v
		}
	}
	t.Fatalf("/metrics has no sample %s:\n%s", series, body)
	return 0
}

// waitUntil polls cond every 20 ms until it holds or 30 s pass.
func waitUntil(t *testing.T, what string, cond func() bool) {
	t.Helper()
	deadline := time.Now().Add(30 * time.Second)
	tick := time.NewTicker(20 * time.Millisecond)
	defer tick.Stop()
	for !cond() {
		if time.Now().After(deadline) {
			t.Fatalf("gave up after 30 s waiting for %s", what)
		}
		<-tick.C
	}
}

func TestMetricsAndHealth(t *testing.T) {
	url, pool := salesDB(t)
	ctx := context.Background()
	const poll = 200 * time.Millisecond
	m := newSidecarMetrics(poll, pool, slog.New(slog.DiscardHandler))
	srv := httptest.NewServer(m.handler())
	defer srv.Close()

	code, body := get(t, srv.URL+"/healthz")
	if code != http.StatusServiceUnavailable || !strings.Contains(body, "no catch-up has finished") {
		t.Errorf("/healthz before any catch-up: %d %q, want 503 saying none has finished", code, body)
	}

	caught := make(chan pgsync.Stats, 16)
	r := pgsync.NewRunner(url, pgsync.RunnerConfig{
		Poll:           poll,
		OnBatch:        m.onBatch,
		OnSessionError: m.onSessionError,
		OnCaughtUp: func(s pgsync.Stats) {
			m.onCaughtUp(s)
			select {
			case caught <- s:
			default:
			}
		},
	}, nil)
	if err := r.Start(ctx); err != nil {
		t.Fatal(err)
	}
	defer r.Stop()
	// A new day for north and a row the trigger rejects (NULL amount).
	for _, sql := range []string{
		`INSERT INTO public.sales VALUES ('north', '2025-05-05', 170)`,
		`INSERT INTO public.sales VALUES ('south', '2025-05-05', NULL)`,
	} {
		if _, err := pool.Exec(ctx, sql); err != nil {
			t.Fatal(err)
		}
	}
	deadline := time.After(30 * time.Second)
	for drained := false; !drained; {
		select {
		case s := <-caught:
			drained = s.Changes >= 1
		case <-deadline:
			t.Fatal("the runner did not drain the new row within 30 s")
		}
	}

	code, body = get(t, srv.URL+"/healthz")
	if code != http.StatusOK || !strings.HasPrefix(body, "ok: caught up") {
		t.Errorf("/healthz after a catch-up: %d %q, want 200 ok", code, body)
	}
	_, body = get(t, srv.URL+"/metrics")
	for _, c := range []struct {
		series string
		min    float64
	}{
		{"sidetrend_changes_drained_total", 1},
		{"sidetrend_series_written_total", 1},
		{`sidetrend_batches_total{kind="drain"}`, 1},
		{`sidetrend_batch_duration_seconds_count{kind="drain"}`, 1},
		{"sidetrend_last_caught_up_timestamp_seconds", float64(time.Now().Add(-time.Minute).Unix())},
	} {
		if v := metricValue(t, body, c.series); v < c.min {
			t.Errorf("%s = %v, want at least %v", c.series, v, c.min)
		}
	}
	// The NULL amount is the one reject; the log was empty at the catch-up
	// and nothing was written since, so the lag is 0.
	if v := metricValue(t, body, "sidetrend_rejects"); v != 1 {
		t.Errorf("sidetrend_rejects = %v, want 1", v)
	}
	if v := metricValue(t, body, "sidetrend_lag_seconds"); v != 0 {
		t.Errorf("sidetrend_lag_seconds = %v, want 0", v)
	}
	if v := metricValue(t, body, "sidetrend_session_errors_total"); v != 0 {
		t.Errorf("sidetrend_session_errors_total = %v, want 0", v)
	}

	// An hour later without a catch-up, after a session error: unhealthy,
	// with the reason.
	r.Stop()
	later := time.Now().Add(time.Hour)
	m.onSessionError(errors.New("connection refused"))
	m.mu.Lock()
	m.now = func() time.Time { return later }
	m.mu.Unlock()
	code, body = get(t, srv.URL+"/healthz")
	if code != http.StatusServiceUnavailable || !strings.Contains(body, "more than 3 poll intervals") || !strings.Contains(body, "connection refused") {
		t.Errorf("/healthz an hour later: %d %q, want 503 with the age and the session error", code, body)
	}
	_, body = get(t, srv.URL+"/metrics")
	if v := metricValue(t, body, "sidetrend_session_errors_total"); v != 1 {
		t.Errorf("sidetrend_session_errors_total = %v, want 1", v)
	}
}

// freeAddr is a loopback address with a port free at the moment.
func freeAddr(t *testing.T) string {
	t.Helper()
	l, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	defer l.Close()
	return l.Addr().String()
}

// TestRunServesHTTP runs the run command with --http and reads /healthz and
// /metrics from it.
func TestRunServesHTTP(t *testing.T) {
	url, _ := salesDB(t)
	addr := freeAddr(t)
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	done := make(chan error, 1)
	go func() {
		_, err := runCLI(t, ctx, "run", "--db", url, "--http", addr, "--poll", "200ms")
		done <- err
	}()
	waitUntil(t, "/healthz to answer 200", func() bool {
		resp, err := http.Get("http://" + addr + "/healthz")
		if err != nil {
			return false
		}
		resp.Body.Close()
		return resp.StatusCode == http.StatusOK
	})
	_, body := get(t, "http://"+addr+"/metrics")
	for _, s := range []string{"sidetrend_changes_drained_total", "sidetrend_lag_seconds", "sidetrend_rejects", "sidetrend_batch_duration_seconds_bucket"} {
		if !strings.Contains(body, s) {
			t.Errorf("/metrics lacks %s", s)
		}
	}
	cancel()
	select {
	case err := <-done:
		if err != nil {
			t.Errorf("run ended with %v", err)
		}
	case <-time.After(30 * time.Second):
		t.Fatal("run did not stop within 30 s of its context ending")
	}
}

func TestServeHTTPBadAddress(t *testing.T) {
	_, err := serveHTTP("127.0.0.1:99999", http.NotFoundHandler(), slog.New(slog.DiscardHandler))
	if err == nil || !strings.Contains(err.Error(), "give host:port") {
		t.Errorf("serveHTTP on port 99999: %v, want an error saying what to give", err)
	}
}

// TestRunEmbedded runs `run --once` with no database configured: it makes
// a private cluster in --data-dir, prints how to reach it, and a second
// run starts the same cluster again.
func TestRunEmbedded(t *testing.T) {
	if testing.Short() {
		t.Skip("starts a private Postgres; skipped with -short")
	}
	for _, k := range []string{"DATABASE_URL", "SIDETREND_DB", "PGHOST", "PGDATABASE"} {
		t.Setenv(k, "")
	}
	base := t.TempDir()
	// The server may run as an unprivileged user: it must reach the
	// directory (testing makes its directories 0700).
	for d := base; d != os.TempDir() && d != "/"; d = filepath.Dir(d) {
		if err := os.Chmod(d, 0o755); err != nil {
			t.Fatal(err)
		}
	}
	dataDir := filepath.Join(base, "pg")
	for i := range 2 {
		out, err := runCLI(t, context.Background(), "run", "--once", "--data-dir", dataDir)
		if err != nil {
			t.Fatalf("run %d: %v\n%s", i+1, err, out)
		}
		for _, s := range []string{"using the private Postgres in " + dataDir, "connection string: postgres://postgres@127.0.0.1:", "/" + embeddedDB + "?sslmode=disable", "psql: ", "-U postgres " + embeddedDB} {
			if !strings.Contains(out, s) {
				t.Errorf("run %d output lacks %q:\n%s", i+1, s, out)
			}
		}
	}
	if _, err := os.Stat(filepath.Join(dataDir, "PG_VERSION")); err != nil {
		t.Errorf("no cluster in %s: %v", dataDir, err)
	}
	if fi, err := os.Stat(filepath.Join(dataDir, "postmaster.pid")); err == nil {
		t.Errorf("the private server still runs after run --once ended (postmaster.pid from %v)", fi.ModTime())
	}
}

// TestRunBadDrainFlags: out-of-range --workers and --batch-size are refused
// before anything starts (no database is named: the check comes first).
func TestRunBadDrainFlags(t *testing.T) {
	t.Parallel()
	ctx := context.Background()
	for _, c := range []struct{ flag, value, want string }{
		{"--workers", "0", "--workers 0 is out of range"},
		{"--workers", "65", "--workers 65 is out of range"},
		{"--batch-size", "0", "--batch-size 0 is out of range"},
		{"--batch-size", "100001", "--batch-size 100001 is out of range"},
	} {
		_, err := runCLI(t, ctx, "run", "--once", "--data-dir", t.TempDir(), c.flag, c.value)
		if err == nil || !strings.Contains(err.Error(), c.want) {
			t.Errorf("run %s %s: error %v, want one that says %q", c.flag, c.value, err, c.want)
		}
	}
}
