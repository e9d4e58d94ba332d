package sqlwire

import (
	"context"
	"errors"
	"fmt"
	"net"
	"strings"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"github.com/jackc/pgx/v5/pgconn"
	"github.com/jackc/pgx/v5/pgproto3"
	"github.com/sidetrend/sidetrend/sqlwire/wire"
)

// These tests trip each limit of limits.go with a real client (pgconn, or
// postgres_fdw of the test server) and check the error says what to change.

// lambdaList is n distinct lambdas from 0.5 up, as SQL text: "0.5, 0.501, ...".
func lambdaList(n int) string {
	vs := make([]string, n)
	for i := range vs {
		vs[i] = fmt.Sprintf("%g", 0.5+float64(i)/1000)
	}
	return strings.Join(vs, ", ")
}

// pgErr returns the *pgconn.PgError in err, or fails the test.
func pgErr(t *testing.T, err error, code string, what string) *pgconn.PgError {
	t.Helper()
	var pe *pgconn.PgError
	if !errors.As(err, &pe) || pe.Code != code {
		t.Fatalf("%s: %v, want SQLSTATE %s", what, err, code)
	}
	return pe
}

// flagshipLong is one daily series of 200,000 points: a what-if refit of
// it (estimator.Fit over every point) takes about 25 ms on the 2-core test
// machine, so that a list of lambdas makes a statement that computes for
// seconds.
func flagshipLong() []seriesSpec { return longSeries(200_000, linearModel) }

// bigBakery is k series like flagshipLong, tracker big_bakery.
func bigBakery(k int) []seriesSpec {
	var out []seriesSpec
	for i := range k {
		s := flagshipLong()[0]
		s.tracker, s.key = "big_bakery", fmt.Sprintf("shop_%d", i+1)
		out = append(out, s)
	}
	return out
}

func TestLimitsThroughFDW(t *testing.T) {
	t.Parallel()
	ctx := testCtx(t, 2*time.Minute)
	cert, key := writeSelfSigned(t)
	src := newMemSource(t, append(scenarioSeries(), bigBakery(8)...))
	f := newFixtureConfig(t, src, Config{TLSCertFile: cert, TLSKeyFile: key, RequireTLS: true,
		Limits: Limits{StatementTimeout: 300 * time.Millisecond, MaxInList: 10, MaxRows: 5000}})
	// sslmode 'require' on the foreign server, as README advises. The
	// test server runs as another user with this process's HOME, where
	// libpq would try ~/.postgresql/postgresql.crt and fail on the
	// permission: point it at a client certificate that does not exist.
	f.exec(t, ctx, f.adminURL, `ALTER SERVER sidetrend_live OPTIONS (ADD sslmode 'require',
		ADD sslcert '/nonexistent-sidetrend/client.crt', ADD sslkey '/nonexistent-sidetrend/client.key')`)
	conn := f.analyst(t, ctx)

	// postgres_fdw negotiates TLS and reads.
	var n int64
	if err := conn.QueryRow(ctx, `SELECT count(*) FROM sidetrend_live.forecast
		WHERE series_key = 'market' AND lambda IN (`+lambdaList(10)+`) AND horizon <= 30`).Scan(&n); err != nil || n != 300 {
		t.Fatalf("10 lambdas x 30 horizons: %d rows, %v", n, err)
	}

	// 11 values in the IN list: postgres_fdw sends = ANY (ARRAY[...]).
	_, err := conn.Exec(ctx, `SELECT * FROM sidetrend_live.forecast
		WHERE series_key = 'market' AND lambda IN (`+lambdaList(11)+`) AND horizon <= 30`)
	pe := pgErr(t, err, codeProgramLimit, "11 lambdas")
	if !strings.Contains(pe.Hint, "--sql-max-in-list") {
		t.Errorf("IN list error %q hint %q: want the setting to raise", pe.Message, pe.Hint)
	}

	// 4 series x 1 lambda x 1251 horizons = 5,004 rows > 5,000.
	_, err = conn.Exec(ctx, `SELECT * FROM sidetrend_live.forecast WHERE tracker = 'bakery_sales' AND horizon <= 1251`)
	pe = pgErr(t, err, codeProgramLimit, "5,004 rows")
	if !strings.Contains(pe.Message, "5,004 rows (4 series x 1 lambda x 1251 horizons)") || !strings.Contains(pe.Hint, "--sql-max-rows") {
		t.Errorf("row limit error %q hint %q", pe.Message, pe.Hint)
	}

	// 80 refits of 200,000 points take seconds, far longer than 300 ms:
	// the endpoint's own timeout stops them (the local one is off).
	_, err = conn.Exec(ctx, `SELECT count(*) FROM sidetrend_live.forecast
		WHERE tracker = 'big_bakery' AND lambda IN (`+lambdaList(10)+`) AND horizon <= 1`)
	pe = pgErr(t, err, codeQueryCanceled, "80 refits of 200,000 points")
	if !strings.Contains(pe.Message, "statement timeout") || !strings.Contains(pe.Hint, "--sql-statement-timeout") {
		t.Errorf("timeout error %q hint %q", pe.Message, pe.Hint)
	}

	// The session goes on.
	if err := conn.QueryRow(ctx, `SELECT count(*) FROM sidetrend_live.series`).Scan(&n); err != nil || n != 13 {
		t.Fatalf("after the errors: %d series, %v", n, err)
	}
}

func TestInListLimit(t *testing.T) {
	t.Parallel()
	ctx := testCtx(t, 30*time.Second)
	srv := startEndpoint(t, newMemSource(t, scenarioSeries()), Config{Limits: Limits{MaxInList: 10}})
	c := mustDirect(t, ctx, srv)
	for _, q := range []string{
		`SELECT count(*) FROM sidetrend_live.forecast WHERE series_key = 'market' AND horizon <= 3 AND lambda IN (%s)`,
		`SELECT count(*) FROM sidetrend_live.forecast WHERE series_key = 'market' AND horizon <= 3 AND lambda = ANY (ARRAY[%s])`,
		`SELECT count(*) FROM sidetrend_live.forecast WHERE series_key = 'market' AND horizon <= 3 AND lambda = ANY ('{%s}'::float8[])`,
	} {
		res, err := execAll(ctx, c, fmt.Sprintf(q, lambdaList(10)))
		if err != nil || string(res[0].Rows[0][0]) != "30" {
			t.Fatalf("10 values: %v %v", res, err)
		}
		_, err = execAll(ctx, c, fmt.Sprintf(q, lambdaList(11)))
		pe := pgErr(t, err, codeProgramLimit, q)
		if !strings.Contains(pe.Message, "11 values") || !strings.Contains(pe.Hint, "--sql-max-in-list") {
			t.Errorf("%s: %q hint %q", q, pe.Message, pe.Hint)
		}
	}
	// An array parameter, as postgres_fdw sends for = ANY ($1).
	q := `SELECT count(*) FROM sidetrend_live.forecast WHERE series_key = 'market' AND horizon <= 3 AND lambda = ANY ($1::float8[])`
	res := c.ExecParams(ctx, q, [][]byte{[]byte("{" + lambdaList(10) + "}")}, nil, nil, nil).Read()
	if res.Err != nil || string(res.Rows[0][0]) != "30" {
		t.Fatalf("parameter of 10 values: %v %v", res.Rows, res.Err)
	}
	res = c.ExecParams(ctx, q, [][]byte{[]byte("{" + lambdaList(11) + "}")}, nil, nil, nil).Read()
	pgErr(t, res.Err, codeProgramLimit, "parameter of 11 values")
}

func TestRowLimit(t *testing.T) {
	t.Parallel()
	ctx := testCtx(t, 30*time.Second)
	src := newMemSource(t, scenarioSeries())
	var values atomic.Int64
	src.setValuesHook(func(context.Context) error { values.Add(1); return nil })
	srv := startEndpoint(t, src, Config{Limits: Limits{MaxRows: 1000}})
	c := mustDirect(t, ctx, srv)

	// 1 series x 1,000 horizons is the most.
	res, err := execAll(ctx, c, `SELECT count(*) FROM sidetrend_live.forecast WHERE series_key = 'market' AND horizon <= 1000`)
	if err != nil || string(res[0].Rows[0][0]) != "1000" {
		t.Fatalf("1,000 rows: %v %v", res, err)
	}
	// 1 series x 3 lambdas x 400 horizons: refused before any refit.
	_, err = execAll(ctx, c, `SELECT count(*) FROM sidetrend_live.forecast WHERE series_key = 'market' AND horizon <= 400 AND lambda IN (0.8, 0.9, 0.95)`)
	pe := pgErr(t, err, codeProgramLimit, "1,200 rows")
	if !strings.Contains(pe.Message, "1,200 rows (1 series x 3 lambdas x 400 horizons)") || !strings.Contains(pe.Hint, "--sql-max-rows") {
		t.Errorf("estimate: %q hint %q", pe.Message, pe.Hint)
	}
	if n := values.Load(); n != 0 {
		t.Errorf("the refused query read the values of %d series, want none", n)
	}
	// The scans of a join count together: 600 + 600 rows are more than
	// 1,000, refused before the second scan computes. The pairs the join
	// forms are Postgres' to form, bounded by the statement timeout.
	_, err = execAll(ctx, c, `SELECT count(*) FROM sidetrend_live.forecast a INNER JOIN sidetrend_live.forecast b
		ON (a.horizon <= b.horizon) WHERE a.series_key = 'market' AND b.series_key = 'market' AND a.horizon <= 600 AND b.horizon <= 600`)
	pe = pgErr(t, err, codeProgramLimit, "join of 600 + 600 rows")
	if !strings.Contains(pe.Message, "600 rows (1 series x 1 lambda x 600 horizons)") {
		t.Errorf("join: %q", pe.Message)
	}
	// The same join with 40 horizons forms 820 pairs from 80 rows.
	res, err = execAll(ctx, c, `SELECT count(*) FROM sidetrend_live.forecast a INNER JOIN sidetrend_live.forecast b
		ON (a.horizon <= b.horizon) WHERE a.series_key = 'market' AND b.series_key = 'market' AND a.horizon <= 40 AND b.horizon <= 40`)
	if err != nil || string(res[0].Rows[0][0]) != "820" {
		t.Fatalf("join of 820 pairs: %v %v", res, err)
	}
}

func TestStatementMemoryLimit(t *testing.T) {
	t.Parallel()
	ctx := testCtx(t, 30*time.Second)
	src := newMemSource(t, scenarioSeries())
	var values atomic.Int64
	src.setValuesHook(func(context.Context) error { values.Add(1); return nil })
	srv := startEndpoint(t, src, Config{Limits: Limits{MaxStatementMemory: 1 << 20}})
	c := mustDirect(t, ctx, srv)

	// 10,000 computed rows of 13 columns (about 208 bytes each until
	// Postgres has them) are more than 1 MiB. Refused before the refit.
	_, err := execAll(ctx, c, `SELECT * FROM sidetrend_live.forecast
		WHERE series_key = 'market' AND lambda = 0.9 AND horizon <= 10000 ORDER BY forecast`)
	pe := pgErr(t, err, codeOutOfMemory, "10,000 rows")
	if !strings.Contains(pe.Message, "at most 1 MiB") || !strings.Contains(pe.Hint, "--sql-max-statement-memory-mb") {
		t.Errorf("sort: %q hint %q", pe.Message, pe.Hint)
	}
	if n := values.Load(); n != 0 {
		t.Errorf("the refused sort read the values of %d series, want none", n)
	}
	// The result is held too: 4,000 computed rows fit, 4,000 rows of
	// every column four times over do not.
	_, err = execAll(ctx, c, `SELECT *, *, *, * FROM sidetrend_live.forecast
		WHERE series_key = 'market' AND horizon <= 4000`)
	pe = pgErr(t, err, codeOutOfMemory, "result of 4,000 wide rows")
	if !strings.Contains(pe.Message, "the result (over ") {
		t.Errorf("result: %q", pe.Message)
	}
	// Small sorts and groups run.
	res, err := execAll(ctx, c, `SELECT horizon, count(*) FROM sidetrend_live.forecast
		WHERE series_key = 'market' AND horizon <= 100 GROUP BY horizon ORDER BY horizon DESC`)
	if err != nil || len(res[0].Rows) != 100 || string(res[0].Rows[0][0]) != "100" {
		t.Fatalf("100 groups: %v", err)
	}
}

func TestMessageSizeLimit(t *testing.T) {
	t.Parallel()
	ctx := testCtx(t, 30*time.Second)
	srv := startEndpoint(t, newMemSource(t, scenarioSeries()), Config{})
	c := mustDirect(t, ctx, srv)
	// Just under the default 1 MiB: a comment pads the query.
	pad := strings.Repeat("x", DefaultMaxMessageSize-100)
	if _, err := execAll(ctx, c, "SELECT 1 /* "+pad+" */"); err != nil {
		t.Fatalf("query of 1 MiB - 100 bytes: %v", err)
	}
	// The report's case: an IN list of megabytes, refused before it is read.
	big := "SELECT * FROM sidetrend_live.forecast WHERE horizon <= 1 AND lambda IN (" +
		strings.Repeat("0.5, ", 3<<20/5) + "0.5)"
	_, err := execAll(ctx, c, big)
	pe := pgErr(t, err, codeProgramLimit, "3 MiB query")
	if pe.Severity != "FATAL" || !strings.Contains(pe.Hint, "--sql-max-message-kb") {
		t.Errorf("%s %q hint %q", pe.Severity, pe.Message, pe.Hint)
	}
	if !c.IsClosed() {
		if _, err := execAll(ctx, c, "SELECT 1"); err == nil {
			t.Error("the session went on after a FATAL error")
		}
	}
	// Other sessions are unaffected.
	if _, err := execAll(ctx, mustDirect(t, ctx, srv), "SELECT 1"); err != nil {
		t.Fatal(err)
	}
}

func TestClientDisconnectStopsStatement(t *testing.T) {
	t.Parallel()
	ctx := testCtx(t, time.Minute)
	src := newMemSource(t, flagshipLong())
	// 200 refits of 200,000 points run for far longer than the test; the
	// statement timeout is out of the way.
	srv := startEndpoint(t, src, Config{Limits: Limits{StatementTimeout: time.Hour}})
	started := make(chan struct{})
	causes := make(chan error, 1)
	var once sync.Once
	src.setValuesHook(func(c context.Context) error {
		once.Do(func() {
			context.AfterFunc(c, func() { causes <- context.Cause(c) })
			close(started)
		})
		return nil
	})
	// A raw client: pgconn would send a cancel request as it closes.
	d, err := net.Dial("tcp", srv.Addr().String())
	if err != nil {
		t.Fatal(err)
	}
	fe := startupRaw(t, d, testUser, testPassword)
	fe.Send(&pgproto3.Query{String: `SELECT count(*) FROM sidetrend_live.forecast
		WHERE series_key = 'flagship' AND horizon <= 1 AND lambda IN (` + lambdaList(200) + `)`})
	if err := fe.Flush(); err != nil {
		t.Fatal(err)
	}
	select {
	case <-started:
	case <-ctx.Done():
		t.Fatal("the query never reached the source")
	}
	// The client goes away without a word.
	d.Close()
	select {
	case cause := <-causes:
		if !errors.Is(cause, wire.ErrClientGone) {
			t.Fatalf("the statement's context ended with %v, want %v", cause, wire.ErrClientGone)
		}
	case <-ctx.Done():
		t.Fatal("the statement went on computing after its client disconnected")
	}
	// The refits stop: the session ends.
	for srv.Sessions() != 0 {
		select {
		case <-ctx.Done():
			t.Fatal("the session of the disconnected client is still computing")
		case <-time.After(20 * time.Millisecond):
		}
	}
}

func TestUnauthenticatedLimit(t *testing.T) {
	t.Parallel()
	ctx := testCtx(t, time.Minute)
	srv := startEndpoint(t, newMemSource(t, scenarioSeries()), Config{MaxConnections: 10,
		StartupTimeout: time.Minute, Limits: Limits{MaxUnauthenticated: 4}})
	// Logged-in sessions do not count against the limit.
	for range 5 {
		mustDirect(t, ctx, srv)
	}
	// The server counts a session as logged in a moment after the client
	// is: wait for that, or a late one takes a place below.
	waitFor(t, ctx, "the logins counted", func() bool { return srv.Unauthenticated() == 0 })
	// Four connections that say nothing fill it.
	var idle []net.Conn
	for range 4 {
		d, err := net.Dial("tcp", srv.Addr().String())
		if err != nil {
			t.Fatal(err)
		}
		idle = append(idle, d)
		defer d.Close()
	}
	waitFor(t, ctx, "4 connections not logged in", func() bool { return srv.Unauthenticated() == 4 })
	// The fifth is closed at once: the client reads FATAL 53300 or EOF,
	// and never waits for the startup timeout of a minute.
	d, err := net.Dial("tcp", srv.Addr().String())
	if err != nil {
		t.Fatal(err)
	}
	defer d.Close()
	d.SetReadDeadline(time.Now().Add(20 * time.Second))
	msg, err := pgproto3.NewFrontend(d, d).Receive()
	var timeout net.Error
	if e, ok := msg.(*pgproto3.ErrorResponse); ok {
		if e.Code != codeTooManyConnections || e.Severity != "FATAL" {
			t.Errorf("fifth connection: %s %s %s", e.Severity, e.Code, e.Message)
		}
	} else if err == nil || errors.As(err, &timeout) && timeout.Timeout() {
		t.Fatalf("fifth connection: %v %v, want FATAL 53300 or a closed connection", msg, err)
	}
	if srv.RefusedUnauthenticated() != 1 {
		t.Errorf("%d refused, want 1", srv.RefusedUnauthenticated())
	}
	if _, err := directConn(t, ctx, srv, testUser, testPassword, "sslmode=disable"); err == nil {
		t.Fatal("a client logged in past the limit of connections not logged in")
	}
	// When the idle ones go, logins work again.
	for _, d := range idle {
		d.Close()
	}
	waitFor(t, ctx, "no connection left not logged in", func() bool { return srv.Unauthenticated() == 0 })
	mustDirect(t, ctx, srv)
	if srv.Sessions() != 6 {
		t.Errorf("%d sessions, want 6", srv.Sessions())
	}
}

// waitFor polls cond until it holds, failing the test when ctx ends.
func waitFor(t *testing.T, ctx context.Context, what string, cond func() bool) {
	t.Helper()
	for !cond() {
		select {
		case <-ctx.Done():
			t.Fatalf("waiting for %s: %v", what, ctx.Err())
		case <-time.After(10 * time.Millisecond):
		}
	}
}

// connectFrom logs in from local address ip (any of 127.0.0.0/8 reaches
// the endpoint on 127.0.0.1).
func connectFrom(ctx context.Context, srv *Server, ip, password string) (*pgconn.PgConn, error) {
	cfg, err := pgconn.ParseConfig(fmt.Sprintf("postgres://%s:%s@%s/sidetrend?sslmode=disable", testUser, password, srv.Addr()))
	if err != nil {
		return nil, err
	}
	d := &net.Dialer{LocalAddr: &net.TCPAddr{IP: net.ParseIP(ip)}}
	cfg.DialFunc = d.DialContext
	return pgconn.ConnectConfig(ctx, cfg)
}

func TestFailedLoginDelay(t *testing.T) {
	t.Parallel()
	ctx := testCtx(t, time.Minute)
	// 20 ms doubling up to 160 ms: 20 failures wait 20 + 40 + 80 +
	// 17 x 160 = 2,860 ms at least.
	srv := startEndpoint(t, newMemSource(t, scenarioSeries()), Config{
		Limits: Limits{AuthFailureDelay: 20 * time.Millisecond, AuthFailureMaxDelay: 160 * time.Millisecond}})
	begin := time.Now()
	for i := range 20 {
		_, err := connectFrom(ctx, srv, "127.0.0.1", "wrong")
		if pgCode(err) != codeInvalidPassword {
			t.Fatalf("attempt %d: %v, want 28P01", i, err)
		}
	}
	if took := time.Since(begin); took < 2860*time.Millisecond {
		t.Fatalf("20 wrong passwords took %v, want at least 2.86 s of delays", took)
	}
}

func TestFailedLoginDelayIsPerAddress(t *testing.T) {
	t.Parallel()
	ctx := testCtx(t, time.Minute)
	srv := startEndpoint(t, newMemSource(t, scenarioSeries()), Config{
		Limits: Limits{AuthFailureDelay: 5 * time.Second, AuthFailureMaxDelay: 5 * time.Second}})
	bad := make(chan error, 1)
	go func() {
		_, err := connectFrom(ctx, srv, "127.0.0.1", "wrong")
		bad <- err
	}()
	waitFor(t, ctx, "the failed login", func() bool { return srv.w.FailedLoginAddresses() == 1 })
	// While 127.0.0.1 waits out its 5 s, 127.0.0.2 logs in.
	c, err := connectFrom(ctx, srv, "127.0.0.2", testPassword)
	if err != nil {
		t.Fatal(err)
	}
	c.Close(ctx)
	select {
	case err := <-bad:
		t.Fatalf("the failed login from 127.0.0.1 was answered (%v) before the good one from 127.0.0.2", err)
	default:
	}
	if err := <-bad; pgCode(err) != codeInvalidPassword {
		t.Fatalf("failed login: %v", err)
	}
}

func TestRequireTLS(t *testing.T) {
	t.Parallel()
	ctx := testCtx(t, 30*time.Second)
	cert, key := writeSelfSigned(t)
	src := newMemSource(t, scenarioSeries())
	srv := startEndpoint(t, src, Config{TLSCertFile: cert, TLSKeyFile: key, RequireTLS: true})
	_, err := directConn(t, ctx, srv, testUser, testPassword, "sslmode=disable")
	var pe *pgconn.PgError
	if !errors.As(err, &pe) || pe.Code != codeInvalidAuth || pe.Severity != "FATAL" || !strings.Contains(pe.Message, "TLS is required") {
		t.Fatalf("plaintext client: %v, want FATAL 28000 saying TLS is required", err)
	}
	c, err := directConn(t, ctx, srv, testUser, testPassword, "sslmode=require")
	if err != nil {
		t.Fatal(err)
	}
	if _, err := execAll(ctx, c, "SELECT 1"); err != nil {
		t.Fatal(err)
	}
	// A cancel request arrives in plaintext (libpq before 17 sends it so)
	// and is still honoured.
	src.setValuesHook(func(c context.Context) error { <-c.Done(); return c.Err() })
	done := make(chan error, 1)
	go func() { _, err := execAll(ctx, c, "SELECT count(*) FROM sidetrend_live.backtest"); done <- err }()
	waitFor(t, ctx, "the statement to start", func() bool { return srv.running.Load() > 0 })
	if err := c.CancelRequest(ctx); err != nil {
		t.Fatal(err)
	}
	if err := <-done; pgCode(err) != codeQueryCanceled {
		t.Fatalf("cancelled statement: %v", err)
	}

	err = New(Config{Listen: "127.0.0.1:0", Credentials: map[string]string{"a": "b"}, RequireTLS: true}, src, nil, nil).Start(ctx)
	if err == nil || !strings.Contains(err.Error(), "TLS is required but no certificate") {
		t.Fatalf("RequireTLS without a certificate: %v", err)
	}
}
