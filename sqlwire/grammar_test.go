package sqlwire

import (
	"context"
	"errors"
	"github.com/sidetrend/sidetrend/sqlwire/livetables"
	"math/big"
	"strconv"
	"strings"
	"testing"
	"time"
)

// The statement shapes below are the ones postgres_fdw 15 sends, as written
// in /work/shared/notes/postgres-fdw-protocol.md (sections 2-5) and as
// produced by contrib/postgres_fdw/deparse.c (deparseSelectStmtForRel,
// appendConditions, deparseConst, deparseOpExpr, deparseScalarArrayOpExpr,
// printRemoteParam, appendOrderByClause, appendLimitClause).
func TestParseSessionStatements(t *testing.T) {
	cases := []struct {
		sql  string
		want string // statement type and key fields
	}{
		{"SET search_path = pg_catalog", "set search_path=pg_catalog"},
		{"SET timezone = 'GMT'", "set timezone=GMT"},
		{"SET datestyle = ISO", "set datestyle=iso"},
		{"SET intervalstyle = postgres", "set intervalstyle=postgres"},
		{"SET extra_float_digits = 3", "set extra_float_digits=3"},
		{"SET LOCAL statement_timeout TO '200ms'", "set local statement_timeout=200ms"},
		{"SET TIME ZONE 'UTC'", "set timezone=UTC"},
		{"RESET ALL", "reset all"},
		{"START TRANSACTION ISOLATION LEVEL REPEATABLE READ", "begin"},
		{"START TRANSACTION ISOLATION LEVEL SERIALIZABLE", "begin"},
		{"BEGIN READ ONLY, ISOLATION LEVEL READ COMMITTED", "begin"},
		{"SAVEPOINT s2", "savepoint s2"},
		{"RELEASE SAVEPOINT s2", "release s2"},
		{"ROLLBACK TO SAVEPOINT s2", "rollbackto s2"},
		{"COMMIT TRANSACTION", "commit"},
		{"ABORT TRANSACTION", "rollback"},
		{"ROLLBACK", "rollback"},
		{"DEALLOCATE ALL", "deallocate all"},
		{"DEALLOCATE pgsql_fdw_prep_1", "deallocate pgsql_fdw_prep_1"},
		{"FETCH 100 FROM c1", "fetch c1 100"},
		{"FETCH ALL IN c2", "fetch c2 -1"},
		{"FETCH NEXT FROM c3", "fetch c3 1"},
		{"FETCH c4", "fetch c4 1"},
		{"MOVE FORWARD 5 FROM c1", "move c1 5"},
		{"CLOSE c1", "close c1"},
		{"CLOSE ALL", "close all"},
		{"SHOW server_version", "show server_version"},
	}
	for _, c := range cases {
		st, err := parseStatement(c.sql)
		if err != nil {
			t.Errorf("%s: %v", c.sql, err)
			continue
		}
		if got := describeStmt(st); got != c.want {
			t.Errorf("%s: got %q, want %q", c.sql, got, c.want)
		}
	}
}

func describeStmt(st stmt) string {
	switch s := st.(type) {
	case *setStmt:
		switch {
		case s.all:
			return "reset all"
		case s.local:
			return "set local " + s.name + "=" + s.value
		}
		return "set " + s.name + "=" + s.value
	case *txStmt:
		return map[txKind]string{txBegin: "begin", txCommit: "commit", txRollback: "rollback",
			txSavepoint: "savepoint " + s.name, txRelease: "release " + s.name, txRollbackTo: "rollbackto " + s.name}[s.kind]
	case *deallocateStmt:
		if s.all {
			return "deallocate all"
		}
		return "deallocate " + s.name
	case *fetchStmt:
		v := "fetch "
		if s.move {
			v = "move "
		}
		return v + s.name + " " + itoa(s.count)
	case *closeStmt:
		if s.all {
			return "close all"
		}
		return "close " + s.name
	case *showStmt:
		return "show " + s.name
	case *declareStmt:
		return "declare " + s.name
	case *selectStmt:
		return "select"
	}
	return "?"
}

func itoa(n int64) string {
	if n < 0 {
		return "-" + itoa(-n)
	}
	if n < 10 {
		return string(rune('0' + n))
	}
	return itoa(n/10) + string(rune('0'+n%10))
}

func TestParseMultipleStatements(t *testing.T) {
	// pgfdw_abort_cleanup sends these two in one Query (notes, section 3).
	stmts, err := parseStatements("ROLLBACK TO SAVEPOINT s2; RELEASE SAVEPOINT s2")
	if err != nil {
		t.Fatal(err)
	}
	if len(stmts) != 2 || describeStmt(stmts[0]) != "rollbackto s2" || describeStmt(stmts[1]) != "release s2" {
		t.Fatalf("got %d statements: %v", len(stmts), stmts)
	}
	stmts, err = parseStatements("  ;; ")
	if err != nil || len(stmts) != 1 {
		t.Fatalf("empty query: %v %v", stmts, err)
	}
	if _, ok := stmts[0].(*emptyStmt); !ok {
		t.Fatalf("empty query parsed as %T", stmts[0])
	}
}

// Positions of the forecast table's parameter columns.
const (
	fcTracker = 0
	fcLambda  = 2
	fcHorizon = 3
)

// domainsOf parses a SELECT or cursor declaration and works out the
// domains of its first table's columns, with the test server evaluating
// the constants.
func domainsOf(t *testing.T, sql string, params ...paramVal) []livetables.Domain {
	t.Helper()
	st, err := parseStatement(sql)
	if err != nil {
		t.Fatalf("%s: %v", sql, err)
	}
	q := statementQuery(st)
	if q == nil {
		t.Fatalf("%s: parsed as %T", sql, st)
	}
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	lim := Limits{}.withDefaults()
	ds, err := newPushdown(q, params, &lim).domains(ctx, &evaluator{pool: evalPool(t)}, newSettings("test"))
	if err != nil {
		t.Fatalf("%s: %v", sql, err)
	}
	return ds[q.rels[0]]
}

func TestDeparsedShapes(t *testing.T) {
	cases := []struct {
		sql      string
		horizons string // the horizon domain as livetables.Horizons() reads it, or an error code
		lambdas  string
		tracker  string
	}{
		{"DECLARE c1 CURSOR FOR\nSELECT tracker, series_key, horizon, forecast FROM sidetrend_live.forecast WHERE ((horizon <= 30))",
			"1..30", "stored", "any"},
		{"DECLARE c1 CURSOR FOR\nSELECT tracker, forecast FROM sidetrend_live.forecast WHERE ((horizon < 8)) AND ((tracker = 'shop_sales'))",
			"1..7", "stored", "shop_sales"},
		{"DECLARE c1 CURSOR FOR\nSELECT forecast FROM sidetrend_live.forecast WHERE ((horizon = 12))", "12", "stored", "any"},
		{"DECLARE c1 CURSOR FOR\nSELECT forecast FROM sidetrend_live.forecast WHERE ((horizon = ANY ('{1,7,30}'::integer[])))",
			"1,7,30", "stored", "any"},
		{"DECLARE c1 CURSOR FOR\nSELECT forecast FROM sidetrend_live.forecast WHERE ((horizon >= 5)) AND ((horizon <= 9))",
			"5..9", "stored", "any"},
		{"DECLARE c1 CURSOR FOR\nSELECT forecast FROM sidetrend_live.forecast WHERE ((horizon <= 3)) AND ((lambda = 0.9::double precision))",
			"1..3", "0.9", "any"},
		{"DECLARE c1 CURSOR FOR\nSELECT forecast FROM sidetrend_live.forecast WHERE ((horizon <= 3)) AND ((lambda = ANY ('{0.9,0.95}'::double precision[])))",
			"1..3", "0.9,0.95", "any"},
		{"DECLARE c1 CURSOR FOR\nSELECT forecast FROM sidetrend_live.forecast WHERE ((horizon <= $1::integer)) AND ((tracker = $2::text))",
			"1..4", "stored", "meter"},
		{"DECLARE c1 CURSOR FOR\nSELECT forecast FROM sidetrend_live.forecast WHERE ((horizon OPERATOR(pg_catalog.<=) 2))",
			"1..2", "stored", "any"},
		{"DECLARE c1 CURSOR FOR\nSELECT forecast FROM sidetrend_live.forecast WHERE (((horizon = 1) OR (horizon = 3)))",
			"1,3", "stored", "any"},
		{"DECLARE c1 CURSOR FOR\nSELECT forecast FROM sidetrend_live.forecast WHERE ((horizon <= 2.5))", "1..2", "stored", "any"},
		{"DECLARE c1 CURSOR FOR\nSELECT forecast FROM sidetrend_live.forecast WHERE ((horizon <= 30::bigint)) AND ((horizon > (-1)))",
			"1..30", "stored", "any"},
		{"DECLARE c1 CURSOR FOR\nSELECT forecast FROM sidetrend_live.forecast WHERE ((horizon IS NULL))", "none", "stored", "any"},
		{"DECLARE c1 CURSOR FOR\nSELECT forecast FROM sidetrend_live.forecast WHERE ((horizon <= 10)) AND ((tracker = ANY (ARRAY['a'::text, $2::text])))",
			"1..10", "stored", "a,meter"},
	}
	params := []paramVal{{text: "4"}, {text: "meter"}}
	for _, c := range cases {
		d := domainsOf(t, c.sql, params...)
		if got := horizonString(d[fcHorizon]); got != c.horizons {
			t.Errorf("%s\nhorizons %s, want %s", c.sql, got, c.horizons)
		}
		ls, pinned, err := livetables.Lambdas(d[fcLambda])
		got := "stored"
		if err != nil {
			got = err.Error()
		} else if pinned {
			got = joinFloats(ls)
		}
		if got != c.lambdas {
			t.Errorf("%s\nlambdas %s, want %s", c.sql, got, c.lambdas)
		}
		tr := "any"
		if set, ok := d[fcTracker].TextSet(); ok {
			tr = strings.Join(set, ",")
		}
		if tr != c.tracker {
			t.Errorf("%s\ntracker %s, want %s", c.sql, tr, c.tracker)
		}
	}
}

func horizonString(d livetables.Domain) string {
	hs, err := livetables.Horizons(d)
	if err != nil {
		return asSQLError(err).Code
	}
	if len(hs) == 0 {
		return "none"
	}
	contiguous := len(hs) > 2
	for i := 1; i < len(hs); i++ {
		if hs[i] != hs[i-1]+1 {
			contiguous = false
		}
	}
	if contiguous || len(hs) == 2 && hs[1] == hs[0]+1 && hs[0] > 1 {
		return itoa(int64(hs[0])) + ".." + itoa(int64(hs[len(hs)-1]))
	}
	if len(hs) == 2 && hs[0] == 1 && hs[1] == 2 {
		return "1..2"
	}
	parts := make([]string, len(hs))
	for i, h := range hs {
		parts[i] = itoa(int64(h))
	}
	return strings.Join(parts, ",")
}

func joinFloats(fs []float64) string {
	parts := make([]string, len(fs))
	for i, f := range fs {
		parts[i] = strconv.FormatFloat(f, 'g', -1, 64)
	}
	return strings.Join(parts, ",")
}

func TestRefusals(t *testing.T) {
	cases := []struct {
		sql, code, says string
	}{
		{"INSERT INTO sidetrend_live.forecast(tracker) VALUES ($1)", codeReadOnly, "read-only"},
		{"UPDATE sidetrend_live.forecast SET forecast = 1::double precision WHERE ((horizon = 1))", codeReadOnly, "read-only"},
		{"DELETE FROM sidetrend_live.series", codeReadOnly, "read-only"},
		{"EXPLAIN SELECT forecast FROM sidetrend_live.forecast", codeFeatureNotSupported, "use_remote_estimate"},
		{"VACUUM", codeFeatureNotSupported, "VacuumStmt"},
		{"LISTEN sidetrend", codeFeatureNotSupported, "not supported"},
		{"SELECT forecast FROM sidetrend_live.forecast WHERE ((horizon <= 3)) FOR UPDATE", codeFeatureNotSupported, "FOR UPDATE"},
		{"SELECT tracker FROM sidetrend_live.series TABLESAMPLE BERNOULLI(10)", codeFeatureNotSupported, "TABLESAMPLE"},
		{"SELEKT 1", codeSyntax, "SELEKT"},
		{"SELECT (1", codeSyntax, "end of input"},
		{"SELECT 'abc", codeSyntax, "unterminated"},
		{"DECLARE c1 SCROLL CURSOR FOR SELECT 1", codeFeatureNotSupported, "SCROLL"},
		{"FETCH BACKWARD 1 FROM c1", codeFeatureNotSupported, "forward"},
		{"SELECT forecast FROM sidetrend_live.forecast WHERE ((tracker OPERATOR(public.=) 'x'))", codeFeatureNotSupported, "operator public.="},
		{"SELECT forecast FROM sidetrend_live.forecast WHERE pg_sleep(1) IS NULL", codeFeatureNotSupported, "function pg_sleep"},
		{"SELECT pg_read_file('/etc/passwd')", codeFeatureNotSupported, "function pg_read_file"},
		{"SELECT * FROM sidetrend.series", codeUndefinedTable, "sidetrend.series"},
		{"SELECT forecast FROM sidetrend_live.nothing", codeUndefinedTable, "nothing"},
		{"SELECT forecast FROM sidetrend_live.forecast WHERE horizon IN (SELECT 1)", codeFeatureNotSupported, "subqueries"},
		{"SELECT x FROM (SELECT 1 AS x) s", codeFeatureNotSupported, "subqueries"},
		{"SELECT * FROM generate_series(1, 3)", codeFeatureNotSupported, "functions in FROM"},
		{"WITH a AS (SELECT 1) SELECT * FROM a", codeFeatureNotSupported, "WITH"},
		{"SELECT 1 UNION SELECT 2", codeFeatureNotSupported, "UNION"},
		{"SELECT 'x'::regclass", codeFeatureNotSupported, "type regclass"},
		{"SELECT count(*) OVER () FROM sidetrend_live.series", codeFeatureNotSupported, "window"},
		// What psql's \dt and \d send.
		{`SELECT n.nspname as "Schema", c.relname as "Name" FROM pg_catalog.pg_class c LEFT JOIN pg_catalog.pg_namespace n ON n.oid = c.relnamespace WHERE c.relkind IN ('r','p','')`,
			codeFeatureNotSupported, "psql's \\d commands"},
		{`SELECT c.oid, n.nspname, c.relname FROM pg_catalog.pg_class c LEFT JOIN pg_catalog.pg_namespace n ON n.oid = c.relnamespace WHERE c.relname OPERATOR(pg_catalog.~) '^(forecast)$' COLLATE pg_catalog.default`,
			codeFeatureNotSupported, "not supported here"},
	}
	for _, c := range cases {
		_, err := parseStatement(c.sql)
		if err == nil {
			t.Errorf("%s: parsed, want error %s", c.sql, c.code)
			continue
		}
		var se *sqlError
		if !errors.As(err, &se) || se.Code != c.code || !strings.Contains(se.Error(), c.says) {
			t.Errorf("%s: got %v (%s), want %s mentioning %q", c.sql, err, code(err), c.code, c.says)
		}
	}
}

func code(err error) string {
	if err == nil {
		return ""
	}
	return asSQLError(err).Code
}

func TestHorizonRequired(t *testing.T) {
	for _, sql := range []string{
		"SELECT forecast FROM sidetrend_live.forecast",
		"SELECT forecast FROM sidetrend_live.forecast WHERE ((horizon > 3))",
		"SELECT forecast FROM sidetrend_live.forecast WHERE (((horizon < 3) OR (tracker = 'a')))",
	} {
		_, err := livetables.Horizons(domainsOf(t, sql)[fcHorizon])
		if code(err) != codeFeatureNotSupported || !strings.Contains(err.Error(), "WHERE horizon <= 30") {
			t.Errorf("%s: got %v, want the 0A000 error that says to add WHERE horizon <= 30", sql, err)
		}
	}
	if _, err := livetables.Horizons(domainsOf(t, "SELECT forecast FROM sidetrend_live.forecast WHERE horizon <= 10001")[fcHorizon]); code(err) != codeInvalidParameter {
		t.Errorf("horizon <= 10001: got %v, want 22023", err)
	}
	if _, _, err := livetables.Lambdas(domainsOf(t, "SELECT forecast FROM sidetrend_live.forecast WHERE horizon <= 3 AND lambda = 1.3")[fcLambda]); code(err) != codeInvalidParameter || !strings.Contains(err.Error(), "(0, 1]") {
		t.Errorf("lambda 1.3: got %v, want 22023 saying lambda must be in (0, 1]", err)
	}
}

// TestLiteralsCompareAsPostgres checks the literals read without a round
// trip against Postgres' own comparison: a float8 column compares with
// any number in float8, so lambda <= 0.9::numeric holds for the double
// nearest 0.9 (which is above 9/10).
func TestLiteralsCompareAsPostgres(t *testing.T) {
	near := new(big.Rat).SetFloat64(0.9)
	for _, sql := range []string{
		"SELECT * FROM sidetrend_live.backtest WHERE lambda <= 0.9::numeric",
		"SELECT * FROM sidetrend_live.backtest WHERE lambda <= 0.9",
		"SELECT * FROM sidetrend_live.backtest WHERE lambda <= 0.9::double precision",
		"SELECT * FROM sidetrend_live.backtest WHERE lambda <= '0.9'",
	} {
		d := domainsOf(t, sql)[fcLambda]
		if !d.Contains(near) {
			t.Errorf("%s: domain %+v leaves out the double 0.9", sql, d)
		}
	}
	if d := domainsOf(t, "SELECT * FROM sidetrend_live.forecast WHERE horizon <= 2.5::float8")[fcHorizon]; d.Contains(big.NewRat(3, 1)) || !d.Contains(big.NewRat(2, 1)) {
		t.Errorf("horizon <= 2.5::float8: %+v", d)
	}
}
