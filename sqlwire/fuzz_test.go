package sqlwire

import (
	"context"
	"encoding/binary"
	"errors"
	"io"
	"net"
	"os"
	"testing"
	"time"
)

// parseSeeds are statements postgres_fdw sends and near misses of them.
var parseSeeds = []string{
	"SET search_path = pg_catalog",
	"START TRANSACTION ISOLATION LEVEL REPEATABLE READ",
	"ROLLBACK TO SAVEPOINT s2; RELEASE SAVEPOINT s2",
	"DECLARE c1 CURSOR FOR\nSELECT tracker, series_key, horizon, forecast FROM sidetrend_live.forecast WHERE ((horizon <= 30)) AND ((tracker = 'bakery_sales'))",
	"DECLARE c1 CURSOR FOR\nSELECT count(*), sum(forecast) FROM sidetrend_live.forecast WHERE ((horizon <= 3))",
	"SELECT series_key, avg(forecast), max(upper95), count(*) FROM sidetrend_live.forecast WHERE ((horizon >= 1)) AND ((horizon <= 7)) AND ((lambda = ANY ('{0.9,0.95}'::double precision[]))) GROUP BY 1 HAVING ((avg(forecast) > 100::double precision))",
	"SELECT r1.horizon, r2.state FROM (sidetrend_live.forecast r1 INNER JOIN sidetrend_live.series r2 ON (((r1.tracker = r2.tracker)) AND ((r1.series_key = r2.series_key)) AND ((r1.horizon <= 2))))",
	"SELECT tracker, horizon, forecast FROM sidetrend_live.forecast WHERE ((horizon <= 5)) ORDER BY forecast DESC NULLS FIRST LIMIT 3::bigint OFFSET 1::bigint",
	"SELECT forecast FROM sidetrend_live.forecast WHERE ((tracker = $1::text)) AND ((horizon = ($2::date - '2025-06-30'::date)))",
	"SELECT * FROM sidetrend_live.backtest WHERE lambda = 0.9 AND (series_key ~~ 'h%' OR n_errors IS NULL)",
	"SELECT pg_catalog.pg_relation_size('sidetrend_live.series'::pg_catalog.regclass) / 8192",
	"FETCH 100 FROM c1", "CLOSE c1", "SELECT CASE WHEN 1 > 2 THEN 'a' ELSE 'b' END, -2147483648, E'x\\ny', 1e-3",
}

// FuzzParse feeds arbitrary statements to the parser and, when they pass
// the whitelist, works out the domains with the test server evaluating the
// constants: nothing may panic.
func FuzzParse(f *testing.F) {
	for _, s := range parseSeeds {
		f.Add(s)
	}
	params := []paramVal{{text: "bakery_sales"}, {text: "2025-07-02"}}
	lim := Limits{}.withDefaults()
	f.Fuzz(func(t *testing.T, sql string) {
		stmts, err := parseStatements(sql)
		if err != nil {
			return
		}
		for _, st := range stmts {
			q := statementQuery(st)
			if q == nil {
				continue
			}
			ctx, cancel := context.WithTimeout(context.Background(), 2*time.Second)
			newPushdown(q, params, &lim).domains(ctx, &evaluator{pool: evalPool(t)}, newSettings("fuzz"))
			cancel()
		}
	})
}

// FuzzMessages logs in properly, then sends arbitrary bytes as frontend
// messages. The session must not panic and must end by itself once the
// client stops sending (no hang): each case has a deadline.
func FuzzMessages(f *testing.F) {
	msg := func(typ byte, body string) []byte {
		b := []byte{typ, 0, 0, 0, 0}
		binary.BigEndian.PutUint32(b[1:], uint32(len(body)+4))
		return append(b, body...)
	}
	q := func(s string) []byte { return msg('Q', s+"\x00") }
	f.Add(q("SELECT 1"))
	f.Add(append(q("BEGIN"), q("DECLARE c1 CURSOR FOR SELECT tracker FROM sidetrend_live.series")...))
	f.Add(msg('P', "\x00SELECT $1::integer\x00\x00\x00"))
	f.Add(append(msg('P', "s\x00SELECT 1\x00\x00\x00"), msg('B', "\x00s\x00\x00\x00\x00\x00\x00\x00")...))
	f.Add(msg('S', ""))
	f.Add(msg('X', ""))
	f.Add([]byte{'Q', 0xff, 0xff, 0xff, 0xff})
	f.Add([]byte{'Z', 0, 0, 0, 4})
	for _, s := range parseSeeds {
		f.Add(q(s))
	}
	srv := startEndpoint(f, newMemSource(f, scenarioSeries()), Config{})
	f.Fuzz(func(t *testing.T, data []byte) {
		conn, err := net.Dial("tcp", srv.Addr().String())
		if err != nil {
			t.Fatal(err)
		}
		defer conn.Close()
		if _, err := loginRaw(conn, testUser, testPassword); err != nil {
			t.Fatalf("login: %v", err)
		}
		conn.SetDeadline(time.Now().Add(20 * time.Second))
		// Drain answers while writing, so that neither side blocks.
		drained := make(chan error, 1)
		go func() {
			_, err := io.Copy(io.Discard, conn)
			drained <- err
		}()
		conn.Write(data)
		conn.Write(msg('X', "")) // a Terminate after the bytes, in case they left the stream in sync
		conn.(*net.TCPConn).CloseWrite()
		// The server may close with unread input, which resets the
		// connection; only a deadline that runs out is a hang.
		if err := <-drained; errors.Is(err, os.ErrDeadlineExceeded) {
			t.Fatalf("the session did not end after the client stopped sending: %v", err)
		}
	})
}
