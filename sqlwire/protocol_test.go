package sqlwire

import (
	"context"
	"crypto/ecdsa"
	"crypto/elliptic"
	"crypto/rand"
	"crypto/tls"
	"crypto/x509"
	"crypto/x509/pkix"
	"encoding/pem"
	"fmt"
	"math/big"
	"net"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/jackc/pgx/v5/pgconn"
	"github.com/jackc/pgx/v5/pgproto3"
)

// These tests talk to the endpoint directly with pgx's pgconn, a client
// written independently of the endpoint, to pin down the protocol details
// postgres_fdw relies on.

func directConn(t testing.TB, ctx context.Context, srv *Server, user, password, extra string) (*pgconn.PgConn, error) {
	port := srv.Addr().(*net.TCPAddr).Port
	c, err := pgconn.Connect(ctx, fmt.Sprintf("postgres://%s:%s@127.0.0.1:%d/sidetrend?%s", user, password, port, extra))
	if err == nil {
		t.Cleanup(func() { c.Close(context.Background()) })
	}
	return c, err
}

func mustDirect(t testing.TB, ctx context.Context, srv *Server) *pgconn.PgConn {
	t.Helper()
	c, err := directConn(t, ctx, srv, testUser, testPassword, "sslmode=disable")
	if err != nil {
		t.Fatalf("connect: %v", err)
	}
	return c
}

func execAll(ctx context.Context, c *pgconn.PgConn, sql string) ([]*pgconn.Result, error) {
	return c.Exec(ctx, sql).ReadAll()
}

func TestGreeting(t *testing.T) {
	t.Parallel()
	ctx := testCtx(t, 30*time.Second)
	srv := startEndpoint(t, newMemSource(t, scenarioSeries()), Config{})
	c := mustDirect(t, ctx, srv)
	for k, want := range map[string]string{
		"server_version": ServerVersion, "client_encoding": "UTF8", "standard_conforming_strings": "on",
		"DateStyle": "ISO, MDY", "integer_datetimes": "on", "TimeZone": "UTC", "server_encoding": "UTF8",
	} {
		if got := c.ParameterStatus(k); got != want {
			t.Errorf("ParameterStatus %s = %q, want %q", k, got, want)
		}
	}
	if c.PID() == 0 || len(c.SecretKey()) != 4 {
		t.Errorf("BackendKeyData: pid %d, secret %x (protocol 3.0 keys are 4 bytes)", c.PID(), c.SecretKey())
	}
	// A changed reported setting comes back as ParameterStatus.
	if _, err := execAll(ctx, c, "SET timezone = 'GMT'"); err != nil {
		t.Fatal(err)
	}
	if got := c.ParameterStatus("TimeZone"); got != "GMT" {
		t.Errorf("TimeZone after SET: %q", got)
	}
	res, err := execAll(ctx, c, "SHOW extra_float_digits")
	if err != nil || string(res[0].Rows[0][0]) != "1" {
		t.Fatalf("SHOW extra_float_digits: %v %v", res, err)
	}
	for _, c2 := range []struct{ sql, code string }{
		{"SET no_such_setting = 1", codeUndefinedObject},
		{"SET extra_float_digits = 9", codeInvalidParameter},
		{"SET datestyle = 'SQL, DMY'", codeFeatureNotSupported},
		{"SET client_encoding = 'LATIN1'", codeFeatureNotSupported},
		{"SET timezone = 'Mars/Olympus'", codeInvalidParameter},
		{"SET server_version = '16'", "55P02"},
	} {
		if _, err := execAll(ctx, c, c2.sql); pgCode(err) != c2.code {
			t.Errorf("%s: %v, want %s", c2.sql, err, c2.code)
		}
	}
}

func TestTransactionStatus(t *testing.T) {
	t.Parallel()
	ctx := testCtx(t, 30*time.Second)
	srv := startEndpoint(t, newMemSource(t, scenarioSeries()), Config{})
	c := mustDirect(t, ctx, srv)
	steps := []struct {
		sql    string
		tags   string // command tags, or the SQLSTATE of the error
		status byte
	}{
		// The sequence postgres_fdw sends for a query in a subtransaction
		// that fails and is rolled back (notes, section 3).
		{"START TRANSACTION ISOLATION LEVEL REPEATABLE READ", "START TRANSACTION", 'T'},
		{"SAVEPOINT s2", "SAVEPOINT", 'T'},
		{"DECLARE c1 CURSOR FOR SELECT horizon FROM sidetrend_live.forecast WHERE ((horizon <= 3)) AND ((series_key = 'market'))", "DECLARE CURSOR", 'T'},
		{"FETCH 2 FROM c1", "FETCH 2", 'T'},
		{"FETCH 2 FROM c1", "FETCH 1", 'T'},
		{"FETCH 2 FROM c1", "FETCH 0", 'T'},
		{"SELECT * FROM sidetrend_live.nothing", codeUndefinedTable, 'E'},
		{"FETCH 1 FROM c1", codeInFailedTx, 'E'},
		{"ROLLBACK TO SAVEPOINT s2; RELEASE SAVEPOINT s2", "ROLLBACK,RELEASE", 'T'},
		{"FETCH 1 FROM c1", codeInvalidCursor, 'E'}, // declared after s2: gone with the rollback
		{"ABORT TRANSACTION", "ROLLBACK", 'I'},
		{"DEALLOCATE ALL", "DEALLOCATE ALL", 'I'},
		{"BEGIN", "BEGIN", 'T'},
		{"DECLARE c1 CURSOR FOR SELECT tracker FROM sidetrend_live.series", "DECLARE CURSOR", 'T'},
		{"DECLARE c1 CURSOR FOR SELECT tracker FROM sidetrend_live.series", codeDuplicateCursor, 'E'},
		{"COMMIT TRANSACTION", "ROLLBACK", 'I'}, // COMMIT of a failed block rolls back
		{"DECLARE c1 CURSOR FOR SELECT tracker FROM sidetrend_live.series", codeNoActiveTx, 'I'},
		{"SAVEPOINT s1", codeNoActiveTx, 'I'},
		{"BEGIN; SAVEPOINT a; SAVEPOINT b; RELEASE SAVEPOINT a", "BEGIN,SAVEPOINT,SAVEPOINT,RELEASE", 'T'},
		{"ROLLBACK TO SAVEPOINT b", codeSavepoint, 'E'}, // released with a
		{"ROLLBACK", "ROLLBACK", 'I'},
		{"BEGIN; SET LOCAL extra_float_digits = 0; SET search_path = x", "BEGIN,SET,SET", 'T'},
		{"ROLLBACK", "ROLLBACK", 'I'},
		{"SHOW search_path", `"$user", public`, 'I'}, // rolled back with the block
		{"", "", 'I'},
	}
	for _, s := range steps {
		res, err := execAll(ctx, c, s.sql)
		var got string
		if err != nil {
			got = pgCode(err)
		} else {
			var tags []string
			for _, r := range res {
				if strings.HasPrefix(s.sql, "SHOW") {
					tags = append(tags, string(r.Rows[0][0]))
					continue
				}
				tags = append(tags, r.CommandTag.String())
			}
			got = strings.Join(tags, ",")
		}
		if got != s.tags || c.TxStatus() != s.status {
			t.Errorf("%s: got %q status %c, want %q status %c (err %v)", s.sql, got, c.TxStatus(), s.tags, s.status, err)
		}
	}
}

func TestExtendedProtocol(t *testing.T) {
	t.Parallel()
	ctx := testCtx(t, 30*time.Second)
	src := newMemSource(t, scenarioSeries())
	srv := startEndpoint(t, src, Config{})
	c := mustDirect(t, ctx, srv)
	if _, err := execAll(ctx, c, "BEGIN"); err != nil {
		t.Fatal(err)
	}
	// postgres_fdw's create_cursor: Parse, Bind with text parameters,
	// Describe portal, Execute, Sync. Describe must answer NoData.
	res := c.ExecParams(ctx, "DECLARE c1 CURSOR FOR\nSELECT horizon, forecast FROM sidetrend_live.forecast WHERE ((tracker = $1::text)) AND ((series_key = $2::text)) AND ((horizon <= $3::integer))",
		[][]byte{[]byte("bakery_sales"), []byte("harbour"), []byte("4")}, nil, nil, nil).Read()
	if res.Err != nil || res.CommandTag.String() != "DECLARE CURSOR" || len(res.FieldDescriptions) != 0 {
		t.Fatalf("DECLARE: tag %q fields %d err %v", res.CommandTag, len(res.FieldDescriptions), res.Err)
	}
	all, err := execAll(ctx, c, "FETCH 100 FROM c1")
	if err != nil {
		t.Fatal(err)
	}
	r := all[0]
	if len(r.Rows) != 4 || len(r.FieldDescriptions) != 2 || r.FieldDescriptions[0].DataTypeOID != 23 || r.FieldDescriptions[1].DataTypeOID != 701 {
		t.Fatalf("FETCH: %d rows, fields %+v", len(r.Rows), r.FieldDescriptions)
	}
	if _, err := execAll(ctx, c, "CLOSE c1; COMMIT"); err != nil {
		t.Fatal(err)
	}

	// A named prepared statement: Describe gives the result columns and
	// parameter types, and it runs with several parameter sets.
	sd, err := c.Prepare(ctx, "by_key", "SELECT series_key, horizon, forecast FROM sidetrend_live.forecast WHERE series_key = $1 AND horizon <= $2::integer ORDER BY horizon", nil)
	if err != nil {
		t.Fatal(err)
	}
	if len(sd.Fields) != 3 || len(sd.ParamOIDs) != 2 || sd.ParamOIDs[1] != 23 {
		t.Fatalf("describe: fields %d params %v", len(sd.Fields), sd.ParamOIDs)
	}
	for _, key := range []string{"market", "station"} {
		r := c.ExecPrepared(ctx, "by_key", [][]byte{[]byte(key), []byte("3")}, nil, nil).Read()
		if r.Err != nil || len(r.Rows) != 3 || string(r.Rows[0][0]) != key || r.CommandTag.String() != "SELECT 3" {
			t.Fatalf("%s: %d rows %q %v", key, len(r.Rows), r.CommandTag, r.Err)
		}
	}
	// A NULL parameter compares as NULL: no rows.
	r2 := c.ExecPrepared(ctx, "by_key", [][]byte{nil, []byte("3")}, nil, nil).Read()
	if r2.Err != nil || len(r2.Rows) != 0 {
		t.Fatalf("NULL key: %d rows, %v", len(r2.Rows), r2.Err)
	}
	// Wrong parameter counts and binary formats are refused.
	if r := c.ExecPrepared(ctx, "by_key", [][]byte{[]byte("x")}, nil, nil).Read(); pgCode(r.Err) != codeProtocolViolation {
		t.Errorf("one parameter for two: %v", r.Err)
	}
	if r := c.ExecParams(ctx, "SELECT $1::integer", [][]byte{{0, 0, 0, 1}}, []uint32{23}, []int16{1}, nil).Read(); pgCode(r.Err) != codeFeatureNotSupported {
		t.Errorf("binary parameter: %v", r.Err)
	}
	if _, err := execAll(ctx, c, "DEALLOCATE by_key"); err != nil {
		t.Fatal(err)
	}
	if _, err := execAll(ctx, c, "DEALLOCATE by_key"); pgCode(err) != codeUnknownStatement {
		t.Errorf("second DEALLOCATE: %v", err)
	}
	// After an error the session is idle and usable ('I', not 'E', outside
	// a block).
	if c.TxStatus() != 'I' {
		t.Errorf("status %c after errors outside a block", c.TxStatus())
	}
}

func TestCancelRequest(t *testing.T) {
	t.Parallel()
	ctx := testCtx(t, 30*time.Second)
	src := newMemSource(t, scenarioSeries())
	srv := startEndpoint(t, src, Config{})
	started := make(chan struct{})
	var once bool
	src.setValuesHook(func(c context.Context) error {
		if !once {
			once = true
			close(started)
		}
		select {
		case <-c.Done():
			return c.Err()
		case <-ctx.Done():
			return ctx.Err()
		}
	})
	c := mustDirect(t, ctx, srv)
	done := make(chan error, 1)
	go func() {
		_, err := execAll(ctx, c, "SELECT count(*) FROM sidetrend_live.backtest")
		done <- err
	}()
	<-started
	if err := c.CancelRequest(ctx); err != nil {
		t.Fatal(err)
	}
	err := <-done
	if pgCode(err) != codeQueryCanceled || !strings.Contains(err.Error(), "user request") {
		t.Fatalf("cancelled query: %v", err)
	}
	if srv.CancelsHonored() != 1 {
		t.Fatalf("%d cancels honored, want 1", srv.CancelsHonored())
	}
	// A cancel request with the wrong key does nothing.
	src.setValuesHook(nil)
	if _, err := execAll(ctx, c, "SELECT 1"); err != nil {
		t.Fatal(err)
	}
	d, err := net.Dial("tcp", srv.Addr().String())
	if err != nil {
		t.Fatal(err)
	}
	// CancelRequest: length 16, code 80877102, pid, a wrong secret.
	msg := []byte{0, 0, 0, 16, 0x04, 0xd2, 0x16, 0x2e}
	msg = append(msg, byte(c.PID()>>24), byte(c.PID()>>16), byte(c.PID()>>8), byte(c.PID()), 1, 2, 3, 4)
	d.Write(msg)
	d.Close()
	if _, err := execAll(ctx, c, "SELECT 1"); err != nil {
		t.Fatalf("after a bad cancel request: %v", err)
	}
}

// writeSelfSigned writes a throwaway certificate and key for 127.0.0.1.
func writeSelfSigned(t *testing.T) (certFile, keyFile string) {
	key, err := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
	if err != nil {
		t.Fatal(err)
	}
	tmpl := &x509.Certificate{SerialNumber: big.NewInt(1), Subject: pkix.Name{CommonName: "sidetrend test"},
		NotBefore: time.Now().Add(-time.Hour), NotAfter: time.Now().Add(time.Hour),
		IPAddresses: []net.IP{net.ParseIP("127.0.0.1")}}
	der, err := x509.CreateCertificate(rand.Reader, tmpl, tmpl, &key.PublicKey, key)
	if err != nil {
		t.Fatal(err)
	}
	kb, err := x509.MarshalECPrivateKey(key)
	if err != nil {
		t.Fatal(err)
	}
	dir := t.TempDir()
	certFile, keyFile = filepath.Join(dir, "cert.pem"), filepath.Join(dir, "key.pem")
	os.WriteFile(certFile, pem.EncodeToMemory(&pem.Block{Type: "CERTIFICATE", Bytes: der}), 0o600)
	os.WriteFile(keyFile, pem.EncodeToMemory(&pem.Block{Type: "EC PRIVATE KEY", Bytes: kb}), 0o600)
	return certFile, keyFile
}

func TestTLS(t *testing.T) {
	t.Parallel()
	ctx := testCtx(t, 30*time.Second)
	cert, key := writeSelfSigned(t)
	srv := startEndpoint(t, newMemSource(t, scenarioSeries()), Config{TLSCertFile: cert, TLSKeyFile: key})
	c, err := directConn(t, ctx, srv, testUser, testPassword, "sslmode=require")
	if err != nil {
		t.Fatal(err)
	}
	if _, ok := c.Conn().(*tls.Conn); !ok {
		t.Fatalf("connection is %T, want TLS", c.Conn())
	}
	if res, err := execAll(ctx, c, "SELECT count(*) FROM sidetrend_live.series"); err != nil || string(res[0].Rows[0][0]) != "5" {
		t.Fatalf("over TLS: %v %v", res, err)
	}
	// Without TLS configured, SSLRequest is answered 'N': sslmode=require
	// fails and sslmode=prefer falls back to plain.
	plain := startEndpoint(t, newMemSource(t, scenarioSeries()), Config{})
	if _, err := directConn(t, ctx, plain, testUser, testPassword, "sslmode=require"); err == nil {
		t.Fatal("sslmode=require connected to a server without TLS")
	}
	if _, err := directConn(t, ctx, plain, testUser, testPassword, "sslmode=prefer"); err != nil {
		t.Fatal(err)
	}
}

func TestStartAndStop(t *testing.T) {
	t.Parallel()
	ctx := testCtx(t, 30*time.Second)
	src := newMemSource(t, scenarioSeries())
	for _, c := range []struct {
		cfg  Config
		says string
	}{
		{Config{Listen: "127.0.0.1:notaport", Credentials: map[string]string{"a": "b"}}, "listen on"},
		{Config{Listen: "127.0.0.1:0"}, "no credentials"},
		{Config{Listen: "127.0.0.1:0", Credentials: map[string]string{"a": "b"}, TLSCertFile: "/nonexistent.pem", TLSKeyFile: "/nonexistent.key"}, "load TLS"},
	} {
		err := New(c.cfg, src, evalPool(t), nil).Start(ctx)
		if err == nil || !strings.Contains(err.Error(), c.says) {
			t.Errorf("%+v: %v, want an error saying %q", c.cfg, err, c.says)
		}
	}

	srv := startEndpoint(t, src, Config{MaxConnections: 2})
	a := mustDirect(t, ctx, srv)
	mustDirect(t, ctx, srv)
	if _, err := directConn(t, ctx, srv, testUser, testPassword, "sslmode=disable"); pgCode(err) != codeTooManyConnections {
		t.Fatalf("third session of two: %v", err)
	}
	if _, err := directConn(t, ctx, srv, testUser, testPassword, "sslmode=disable&dbname=other"); err == nil {
		t.Fatal("connected to another database")
	}
	srv.Stop()
	srv.Stop() // idempotent
	if _, err := execAll(ctx, a, "SELECT 1"); err == nil {
		t.Fatal("a session survived Stop")
	}
	if srv.Sessions() != 0 {
		t.Fatalf("%d sessions after Stop", srv.Sessions())
	}
	if _, err := directConn(t, ctx, srv, testUser, testPassword, "sslmode=disable"); err == nil {
		t.Fatal("connected after Stop")
	}
	New(Config{}, src, nil, nil).Stop() // Stop before Start is harmless
}

func TestStopEndsSessionsWithAdminShutdown(t *testing.T) {
	t.Parallel()
	srv := startEndpoint(t, newMemSource(t, scenarioSeries()), Config{})
	d, err := net.Dial("tcp", srv.Addr().String())
	if err != nil {
		t.Fatal(err)
	}
	defer d.Close()
	fe := startupRaw(t, d, testUser, testPassword)
	srv.Stop()
	d.SetReadDeadline(time.Now().Add(10 * time.Second))
	msg, err := fe.Receive()
	if err != nil {
		t.Fatal(err)
	}
	if e, ok := msg.(*pgproto3.ErrorResponse); !ok || e.Code != codeAdminShutdown || e.Severity != "FATAL" {
		t.Fatalf("after Stop the idle session got %#v, want FATAL 57P01", msg)
	}
}

// TestNonASCIIPassword logs postgres_fdw (libpq, which prepares the
// password with SASLprep) in with a password outside ASCII whose SASLprep
// form differs from its bytes: "ﬁ" (U+FB01) maps to "fi" under NFKC and the
// no-break space U+00A0 to a space (RFC 4013, sections 2.1 and 2.2).
func TestNonASCIIPassword(t *testing.T) {
	t.Parallel()
	ctx := testCtx(t, time.Minute)
	const password = "crème\u00a0brûlée-\ufb01ve" // made up for the test
	f := newFixtureConfig(t, newMemSource(t, scenarioSeries()), Config{Credentials: map[string]string{testUser: password}})
	var n int64
	if err := f.analyst(t, ctx).QueryRow(context.Background(), "SELECT count(*) FROM sidetrend_live.series").Scan(&n); err != nil || n != 5 {
		t.Fatalf("series through a non-ASCII password: %d, %v", n, err)
	}
	// The same password in another normal form is the same password.
	f.attach(t, "crème brûlée-five")
	if err := f.analyst(t, ctx).QueryRow(context.Background(), "SELECT count(*) FROM sidetrend_live.series").Scan(&n); err != nil || n != 5 {
		t.Fatalf("series through the SASLprep form of the password: %d, %v", n, err)
	}
}
