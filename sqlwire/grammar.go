package sqlwire

import (
	"errors"
	"fmt"
	"github.com/sidetrend/sidetrend/sqlwire/livetables"
	"math"
	"strconv"
	"strings"
	"sync"

	pg "github.com/pganalyze/pg_query_go/v6"
	pgquery "github.com/wasilibs/go-pgquery"
	pgqueryparser "github.com/wasilibs/go-pgquery/parser"
)

// Statements are parsed by Postgres' own grammar (libpg_query compiled to
// WebAssembly, run by a pure-Go runtime; README, Dependencies) and then
// checked against a small whitelist of the shapes postgres_fdw sends.
// Anything else is refused with 0A000 naming it: the SELECTs that pass
// run in the sidecar's own Postgres over the computed rows, so the
// whitelist is also what keeps them from reaching anything but those rows
// and built-in, side-effect-free functions.

type stmt interface{ tag() string }

// selectStmt is a whitelisted SELECT: its parse tree, the endpoint tables
// it reads and the highest $n it uses.
type selectStmt struct {
	sel      *pg.SelectStmt
	rels     []*relRef
	maxParam int

	// The statement may be shared through the parse cache: the tree is
	// read only, except by deparse under mu, which keeps its result per
	// number of parameters.
	mu     sync.Mutex
	sqlFor map[int]string
}

// evalSQL is the evaluation query of q for nparams client parameters.
func (q *selectStmt) evalSQL(nparams int) (string, error) {
	q.mu.Lock()
	defer q.mu.Unlock()
	if sql, ok := q.sqlFor[nparams]; ok {
		return sql, nil
	}
	sql, err := deparse(q, nparams)
	if err != nil {
		return "", err
	}
	if q.sqlFor == nil {
		q.sqlFor = map[int]string{}
	}
	q.sqlFor[nparams] = sql
	return sql, nil
}

// relRef is one endpoint table in a SELECT's FROM clause.
type relRef struct {
	rv    *pg.RangeVar
	table *livetables.Table
	alias string
	used  []int // the columns the query refers to, in table order; the others are not sent
}

type declareStmt struct {
	name  string
	query *selectStmt
}

type fetchStmt struct {
	name  string
	count int64 // -1 for ALL
	move  bool
}

type closeStmt struct {
	name string
	all  bool
}

type txKind uint8

const (
	txBegin txKind = iota
	txCommit
	txRollback
	txSavepoint
	txRelease
	txRollbackTo
)

type txStmt struct {
	kind txKind
	verb string // "start" for START TRANSACTION, whose tag differs from BEGIN
	name string // savepoint name
}

type setStmt struct {
	name     string
	value    string // "" with reset or DEFAULT
	reset    bool   // RESET name or SET name TO DEFAULT
	all      bool   // RESET ALL
	local    bool   // SET LOCAL
	tx       bool   // SET TRANSACTION ... (accepted, nothing to change)
	resetCmd bool   // RESET (tag RESET) as opposed to SET ... TO DEFAULT
}

type showStmt struct{ name string }

type deallocateStmt struct {
	name string
	all  bool
}

type discardStmt struct{}

// emptyStmt is a query string with no statement in it.
type emptyStmt struct{}

func (*selectStmt) tag() string     { return "SELECT" }
func (*declareStmt) tag() string    { return "DECLARE CURSOR" }
func (*fetchStmt) tag() string      { return "FETCH" }
func (*closeStmt) tag() string      { return "CLOSE CURSOR" }
func (*setStmt) tag() string        { return "SET" }
func (*showStmt) tag() string       { return "SHOW" }
func (*discardStmt) tag() string    { return "DISCARD ALL" }
func (*emptyStmt) tag() string      { return "" }
func (*deallocateStmt) tag() string { return "DEALLOCATE" }
func (*txStmt) tag() string         { return "TRANSACTION" }

// grammarMu serialises the calls into the parser: each concurrent caller
// would otherwise get its own WebAssembly instance, and every new
// instance compiles the module again (seconds on two cores). One instance,
// reused, parses in about a millisecond.
var grammarMu sync.Mutex

func parseTree(sql string) (*pg.ParseResult, error) {
	grammarMu.Lock()
	defer grammarMu.Unlock()
	return pgquery.Parse(sql)
}

func deparseTree(tree *pg.ParseResult) (string, error) {
	grammarMu.Lock()
	defer grammarMu.Unlock()
	return pgquery.Deparse(tree)
}

// warmGrammar compiles the parser's module ahead of the first statement.
func warmGrammar() { parseTree("SELECT 1") }

// parsed caches what statements parse to, by their text: postgres_fdw sends
// the same DECLARE for every scan of the same query. Statements are
// immutable once made (selectStmt guards its one mutable part), so
// sessions share them. The cache is emptied when it is full.
var parsed = struct {
	sync.Mutex
	m map[string][]stmt
}{m: map[string][]stmt{}}

const parsedMax = 1024

// parseStatements parses a simple-protocol Query string.
func parseStatements(sql string) ([]stmt, error) {
	parsed.Lock()
	stmts, ok := parsed.m[sql]
	parsed.Unlock()
	if ok {
		return stmts, nil
	}
	stmts, err := parseUncached(sql)
	if err != nil {
		return nil, err
	}
	parsed.Lock()
	if len(parsed.m) >= parsedMax {
		parsed.m = map[string][]stmt{}
	}
	parsed.m[sql] = stmts
	parsed.Unlock()
	return stmts, nil
}

func parseUncached(sql string) ([]stmt, error) {
	tree, err := parseTree(sql)
	if err != nil {
		return nil, syntaxError(err)
	}
	if len(tree.Stmts) == 0 {
		return []stmt{&emptyStmt{}}, nil
	}
	out := make([]stmt, 0, len(tree.Stmts))
	for _, raw := range tree.Stmts {
		st, err := classify(raw.Stmt)
		if err != nil {
			return nil, err
		}
		out = append(out, st)
	}
	return out, nil
}

// parseStatement parses the one statement of an extended-protocol Parse.
func parseStatement(sql string) (stmt, error) {
	stmts, err := parseStatements(sql)
	if err != nil {
		return nil, err
	}
	if len(stmts) > 1 {
		return nil, errorf(codeSyntax, "cannot insert multiple commands into a prepared statement")
	}
	return stmts[0], nil
}

func syntaxError(err error) error {
	var pe *pgqueryparser.Error
	if errors.As(err, &pe) {
		return &sqlError{Code: codeSyntax, Severity: "ERROR", Message: pe.Message, Position: pe.Cursorpos}
	}
	return errorf(codeSyntax, "%v", err)
}

// classify turns one parsed statement into what the session runs.
func classify(n *pg.Node) (stmt, error) {
	switch {
	case n.GetSelectStmt() != nil:
		return checkSelect(n.GetSelectStmt())
	case n.GetDeclareCursorStmt() != nil:
		d := n.GetDeclareCursorStmt()
		const binary, scroll, hold = 0x0001, 0x0002, 0x0020
		if d.Options&(binary|scroll|hold) != 0 {
			return nil, notSupported("BINARY, SCROLL and WITH HOLD cursors are not supported: declare a plain cursor")
		}
		sel := d.Query.GetSelectStmt()
		if sel == nil {
			return nil, notSupported("DECLARE is supported for SELECT only")
		}
		q, err := checkSelect(sel)
		if err != nil {
			return nil, err
		}
		return &declareStmt{name: d.Portalname, query: q}, nil
	case n.GetFetchStmt() != nil:
		f := n.GetFetchStmt()
		if f.Direction != pg.FetchDirection_FETCH_FORWARD {
			return nil, notSupported("only FETCH [FORWARD] n and FETCH ALL are supported: cursors here move forward only")
		}
		count := f.HowMany
		if count >= math.MaxInt32 {
			count = -1 // FETCH ALL: the grammar's LONG_MAX, 32 bits in WebAssembly
		}
		return &fetchStmt{name: f.Portalname, count: count, move: f.Ismove}, nil
	case n.GetClosePortalStmt() != nil:
		name := n.GetClosePortalStmt().Portalname
		return &closeStmt{name: name, all: name == ""}, nil
	case n.GetTransactionStmt() != nil:
		return transaction(n.GetTransactionStmt())
	case n.GetVariableSetStmt() != nil:
		return variableSet(n.GetVariableSetStmt())
	case n.GetVariableShowStmt() != nil:
		return &showStmt{name: strings.ToLower(n.GetVariableShowStmt().Name)}, nil
	case n.GetDeallocateStmt() != nil:
		d := n.GetDeallocateStmt()
		return &deallocateStmt{name: d.Name, all: d.Isall || d.Name == ""}, nil
	case n.GetDiscardStmt() != nil:
		if n.GetDiscardStmt().Target != pg.DiscardMode_DISCARD_ALL {
			return nil, notSupported("only DISCARD ALL is supported")
		}
		return &discardStmt{}, nil
	case n.GetInsertStmt() != nil, n.GetUpdateStmt() != nil, n.GetDeleteStmt() != nil, n.GetTruncateStmt() != nil,
		n.GetMergeStmt() != nil, n.GetCopyStmt() != nil:
		return nil, errorf(codeReadOnly, "cannot write to the sidetrend endpoint: its tables are computed, read-only").
			WithHint("declare the foreign tables with updatable 'false' (sql/foreign.sql does)")
	case n.GetExplainStmt() != nil:
		return nil, notSupported("EXPLAIN is not supported by the sidetrend endpoint").
			WithHint("keep use_remote_estimate 'false' on the foreign server")
	}
	return nil, notSupported("%s is not supported by the sidetrend endpoint", nodeName(n)).
		WithHint("the endpoint answers the SELECTs, cursors, transactions and SETs that postgres_fdw sends")
}

func transaction(t *pg.TransactionStmt) (stmt, error) {
	switch t.Kind {
	case pg.TransactionStmtKind_TRANS_STMT_BEGIN:
		return &txStmt{kind: txBegin}, nil
	case pg.TransactionStmtKind_TRANS_STMT_START:
		return &txStmt{kind: txBegin, verb: "start"}, nil
	case pg.TransactionStmtKind_TRANS_STMT_COMMIT:
		if t.Chain {
			return nil, notSupported("COMMIT AND CHAIN is not supported")
		}
		return &txStmt{kind: txCommit}, nil
	case pg.TransactionStmtKind_TRANS_STMT_ROLLBACK:
		if t.Chain {
			return nil, notSupported("ROLLBACK AND CHAIN is not supported")
		}
		return &txStmt{kind: txRollback}, nil
	case pg.TransactionStmtKind_TRANS_STMT_SAVEPOINT:
		return &txStmt{kind: txSavepoint, name: t.SavepointName}, nil
	case pg.TransactionStmtKind_TRANS_STMT_RELEASE:
		return &txStmt{kind: txRelease, name: t.SavepointName}, nil
	case pg.TransactionStmtKind_TRANS_STMT_ROLLBACK_TO:
		return &txStmt{kind: txRollbackTo, name: t.SavepointName}, nil
	}
	return nil, notSupported("two-phase commit is not supported by the sidetrend endpoint")
}

func variableSet(v *pg.VariableSetStmt) (stmt, error) {
	name := strings.ToLower(v.Name)
	switch v.Kind {
	case pg.VariableSetKind_VAR_SET_MULTI:
		// SET TRANSACTION ..., SET SESSION CHARACTERISTICS ...: the
		// endpoint is read-only whatever is asked.
		return &setStmt{tx: true}, nil
	case pg.VariableSetKind_VAR_RESET_ALL:
		return &setStmt{all: true, resetCmd: true}, nil
	case pg.VariableSetKind_VAR_RESET:
		return &setStmt{name: name, reset: true, resetCmd: true}, nil
	case pg.VariableSetKind_VAR_SET_DEFAULT:
		return &setStmt{name: name, reset: true, local: v.IsLocal}, nil
	case pg.VariableSetKind_VAR_SET_VALUE:
		parts := make([]string, 0, len(v.Args))
		for _, a := range v.Args {
			s, ok := constText(a)
			if !ok {
				return nil, notSupported("SET %s takes constants only", name)
			}
			parts = append(parts, s)
		}
		return &setStmt{name: name, value: strings.Join(parts, ", "), local: v.IsLocal}, nil
	}
	return nil, notSupported("SET %s FROM CURRENT is not supported", name)
}

// constText is the text of a constant argument of SET.
func constText(n *pg.Node) (string, bool) {
	if tc := n.GetTypeCast(); tc != nil {
		n = tc.Arg
	}
	c := n.GetAConst()
	if c == nil {
		return "", false
	}
	switch {
	case c.GetSval() != nil:
		return c.GetSval().Sval, true
	case c.GetIval() != nil:
		return strconv.FormatInt(int64(c.GetIval().Ival), 10), true
	case c.GetFval() != nil:
		return c.GetFval().Fval, true
	case c.GetBoolval() != nil:
		return strconv.FormatBool(c.GetBoolval().Boolval), true
	}
	return "", false
}

// nodeName names a node for an error: "CreateStmt" reads "CREATE statement"
// only approximately, so the raw kind is shown.
func nodeName(n *pg.Node) string {
	if n == nil || n.Node == nil {
		return "an empty node"
	}
	s := fmt.Sprintf("%T", n.Node)
	s = strings.TrimPrefix(s, "*pg_query.Node_")
	return s
}

// The whitelist of a SELECT.

// checker walks a SELECT and refuses what is not on the whitelist.
type checker struct {
	q *selectStmt
}

func checkSelect(sel *pg.SelectStmt) (*selectStmt, error) {
	q := &selectStmt{sel: sel}
	c := &checker{q: q}
	if err := c.selectStmt(sel); err != nil {
		return nil, err
	}
	q.usedColumns()
	return q, nil
}

// usedColumns finds, for each table, the columns the query can refer to:
// a column named with the table's alias, an unqualified name any table has,
// every column for * or alias.*, the columns of JOIN USING. A table none of
// whose columns is named still sends its first, so that its rows count.
func (q *selectStmt) usedColumns() {
	used := make([]map[int]bool, len(q.rels))
	for i := range used {
		used[i] = map[int]bool{}
	}
	mark := func(rel, col string) {
		for i, r := range q.rels {
			if rel != "" && rel != r.alias {
				continue
			}
			for j, c := range r.table.Columns {
				if col == "*" || c.Name == col {
					used[i][j] = true
				}
			}
		}
	}
	visit := func(n *pg.Node) {
		walk(n, func(x *pg.Node) {
			cr := x.GetColumnRef()
			if cr == nil {
				return
			}
			var names []string
			for _, f := range cr.Fields {
				if f.GetAStar() != nil {
					names = append(names, "*")
				} else if s := f.GetString_(); s != nil {
					names = append(names, s.Sval)
				}
			}
			switch len(names) {
			case 1:
				mark("", names[0])
			case 2:
				mark(names[0], names[1])
			default:
				mark("", "*")
			}
		})
	}
	s := q.sel
	for _, l := range [][]*pg.Node{s.DistinctClause, s.TargetList, s.GroupClause, s.SortClause} {
		for _, n := range l {
			visit(n)
		}
	}
	for _, n := range []*pg.Node{s.WhereClause, s.HavingClause, s.LimitCount, s.LimitOffset} {
		visit(n)
	}
	var joins func(n *pg.Node)
	joins = func(n *pg.Node) {
		if j := n.GetJoinExpr(); j != nil {
			visit(j.Quals)
			for _, u := range j.UsingClause {
				mark("", u.GetString_().GetSval())
			}
			if j.IsNatural {
				mark("", "*")
			}
			joins(j.Larg)
			joins(j.Rarg)
		}
	}
	for _, f := range s.FromClause {
		joins(f)
	}
	for i, r := range q.rels {
		if len(used[i]) == 0 {
			used[i][0] = true
		}
		for j := range r.table.Columns {
			if used[i][j] {
				r.used = append(r.used, j)
			}
		}
	}
}

func (c *checker) selectStmt(s *pg.SelectStmt) error {
	switch {
	case s.Op != pg.SetOperation_SETOP_NONE:
		return notSupported("UNION, INTERSECT and EXCEPT are not supported by the sidetrend endpoint")
	case s.WithClause != nil:
		return notSupported("WITH is not supported by the sidetrend endpoint")
	case s.IntoClause != nil:
		return notSupported("SELECT INTO is not supported by the sidetrend endpoint")
	case len(s.LockingClause) > 0:
		return notSupported("FOR UPDATE and FOR SHARE are not supported: the endpoint's tables are read-only")
	case len(s.WindowClause) > 0:
		return notSupported("window functions are not supported by the sidetrend endpoint")
	case len(s.ValuesLists) > 0:
		return notSupported("VALUES is not supported by the sidetrend endpoint")
	}
	// FROM first: a catalog query (psql's \d) is named as such before
	// any of its functions are.
	for _, f := range s.FromClause {
		if err := c.fromItem(f); err != nil {
			return err
		}
	}
	lists := [][]*pg.Node{s.DistinctClause, s.TargetList, s.GroupClause, s.SortClause}
	for _, l := range lists {
		for _, n := range l {
			if err := c.expr(n); err != nil {
				return err
			}
		}
	}
	for _, n := range []*pg.Node{s.WhereClause, s.HavingClause, s.LimitCount, s.LimitOffset} {
		if err := c.expr(n); err != nil {
			return err
		}
	}
	return nil
}

func (c *checker) fromItem(n *pg.Node) error {
	switch {
	case n.GetRangeVar() != nil:
		rv := n.GetRangeVar()
		t, err := endpointTable(rv)
		if err != nil {
			return err
		}
		alias := rv.Relname
		if rv.Alias != nil {
			if len(rv.Alias.Colnames) > 0 {
				return notSupported("column aliases on %s are not supported", rv.Relname)
			}
			alias = rv.Alias.Aliasname
		}
		for _, r := range c.q.rels {
			if r.alias == alias {
				return errorf("42712", "table name %q specified more than once", alias)
			}
		}
		c.q.rels = append(c.q.rels, &relRef{rv: rv, table: t, alias: alias})
		return nil
	case n.GetJoinExpr() != nil:
		j := n.GetJoinExpr()
		if j.Alias != nil || j.JoinUsingAlias != nil {
			return notSupported("aliases of joins are not supported by the sidetrend endpoint")
		}
		if err := c.fromItem(j.Larg); err != nil {
			return err
		}
		if err := c.fromItem(j.Rarg); err != nil {
			return err
		}
		for _, u := range j.UsingClause {
			if u.GetString_() == nil {
				return notSupported("JOIN USING takes column names only")
			}
		}
		return c.expr(j.Quals)
	case n.GetRangeSubselect() != nil:
		return notSupported("subqueries are not supported by the sidetrend endpoint").
			WithHint("run the subquery on the local side, for example with OFFSET 0 in it")
	case n.GetRangeFunction() != nil:
		return notSupported("functions in FROM are not supported by the sidetrend endpoint")
	case n.GetRangeTableSample() != nil:
		return notSupported("TABLESAMPLE is not supported by the sidetrend endpoint").
			WithHint("ANALYZE of the foreign tables is not supported; the endpoint computes rows on demand")
	}
	return notSupported("%s in FROM is not supported by the sidetrend endpoint", nodeName(n))
}

// endpointTable resolves a table name, refusing catalog queries with a
// sentence psql users can act on.
func endpointTable(rv *pg.RangeVar) (*livetables.Table, error) {
	served := fmt.Sprintf("the endpoint serves %s.forecast, %s.backtest and %s.series", Schema, Schema, Schema)
	switch rv.Schemaname {
	case "pg_catalog", "information_schema":
		return nil, notSupported("catalog queries (%s.%s) are not supported here: psql's \\d commands do not work against the sidetrend endpoint", rv.Schemaname, rv.Relname).
			WithHint("%s; describe the foreign tables in the local database instead (\\d sidetrend_live.forecast there)", served)
	case "", Schema:
	default:
		return nil, errorf(codeUndefinedTable, "relation \"%s.%s\" does not exist", rv.Schemaname, rv.Relname).WithHint("%s", served)
	}
	if rv.Catalogname != "" {
		return nil, errorf(codeUndefinedTable, "cross-database references are not implemented: %s.%s.%s", rv.Catalogname, rv.Schemaname, rv.Relname)
	}
	t, ok := livetables.Lookup(rv.Relname)
	if !ok {
		if strings.HasPrefix(rv.Relname, "pg_") {
			return nil, notSupported("catalog queries (%s) are not supported here: psql's \\d commands do not work against the sidetrend endpoint", rv.Relname).
				WithHint("%s", served)
		}
		name := rv.Relname
		if rv.Schemaname != "" {
			name = rv.Schemaname + "." + name
		}
		return nil, errorf(codeUndefinedTable, "relation %q does not exist", name).WithHint("%s", served)
	}
	return t, nil
}

// Functions that may be pushed down: built-in, immutable and free of side
// effects, the aggregates postgres_fdw ships and the scalar functions an
// analyst writes in a condition.
var allowedFunctions = map[string]bool{
	"count": true, "sum": true, "avg": true, "min": true, "max": true,
	"stddev": true, "stddev_samp": true, "stddev_pop": true, "variance": true, "var_samp": true, "var_pop": true,
	"bool_and": true, "bool_or": true, "every": true, "array_agg": true, "string_agg": true,
	"percentile_cont": true, "percentile_disc": true, "mode": true,
	"corr": true, "covar_pop": true, "covar_samp": true, "regr_slope": true, "regr_intercept": true,
	"abs": true, "round": true, "trunc": true, "floor": true, "ceil": true, "ceiling": true, "sign": true,
	"sqrt": true, "cbrt": true, "exp": true, "ln": true, "log": true, "log10": true, "power": true, "pow": true, "mod": true,
	"div": true, "float8": true, "float4": true, "int2": true, "int4": true, "int8": true, "numeric": true, "text": true,
	"lower": true, "upper": true, "length": true, "char_length": true, "character_length": true, "octet_length": true,
	"substr": true, "substring": true, "btrim": true, "ltrim": true, "rtrim": true, "replace": true,
	"concat": true, "concat_ws": true, "left": true, "right": true, "starts_with": true, "strpos": true, "position": true,
	"like_escape": true, "similar_to_escape": true,
	"date_trunc": true, "date_part": true, "extract": true, "timezone": true, "isfinite": true, "make_date": true,
	"age": false, // stable: depends on the current date
}

// Operators that may be pushed down (pg_catalog's, by symbol).
var allowedOperators = map[string]bool{
	"=": true, "<>": true, "!=": true, "<": true, ">": true, "<=": true, ">=": true,
	"+": true, "-": true, "*": true, "/": true, "%": true, "^": true, "|/": true, "||/": true, "@": true,
	"||": true, "~~": true, "!~~": true, "~~*": true, "!~~*": true, "~": true, "!~": true, "~*": true, "!~*": true,
	"&": true, "|": true, "#": true, "<<": true, ">>": true,
}

// Types a cast may name.
var allowedTypes = map[string]bool{
	"bool": true, "boolean": true, "int2": true, "int4": true, "int8": true, "smallint": true, "integer": true,
	"int": true, "bigint": true, "float4": true, "float8": true, "real": true, "numeric": true, "decimal": true,
	"text": true, "varchar": true, "bpchar": true, "char": true, "name": true, "date": true, "time": true,
	"timetz": true, "timestamp": true, "timestamptz": true, "interval": true, "unknown": true,
}

// qualifiedName reads a name list, allowing no schema or pg_catalog.
func qualifiedName(names []*pg.Node) (string, bool) {
	var parts []string
	for _, n := range names {
		s := n.GetString_()
		if s == nil {
			return "", false
		}
		parts = append(parts, s.Sval)
	}
	switch len(parts) {
	case 1:
		return parts[0], true
	case 2:
		if parts[0] == "pg_catalog" {
			return parts[1], true
		}
	}
	return strings.Join(parts, "."), false
}

func (c *checker) exprs(ns []*pg.Node) error {
	for _, n := range ns {
		if err := c.expr(n); err != nil {
			return err
		}
	}
	return nil
}

// expr checks one expression node and everything under it.
func (c *checker) expr(n *pg.Node) error {
	if n == nil || n.Node == nil {
		return nil
	}
	switch x := n.Node.(type) {
	case *pg.Node_ColumnRef:
		for _, f := range x.ColumnRef.Fields {
			if f.GetString_() == nil && f.GetAStar() == nil {
				return notSupported("column reference %s is not supported", nodeName(f))
			}
		}
		return nil
	case *pg.Node_AConst, *pg.Node_AStar:
		return nil
	case *pg.Node_ParamRef:
		if int(x.ParamRef.Number) > c.q.maxParam {
			c.q.maxParam = int(x.ParamRef.Number)
		}
		return nil
	case *pg.Node_List:
		return c.exprs(x.List.Items)
	case *pg.Node_ResTarget:
		if len(x.ResTarget.Indirection) > 0 {
			return notSupported("subscripts and field selections are not supported by the sidetrend endpoint")
		}
		return c.expr(x.ResTarget.Val)
	case *pg.Node_SortBy:
		if len(x.SortBy.UseOp) > 0 {
			if op, ok := qualifiedName(x.SortBy.UseOp); !ok || !allowedOperators[op] {
				return notSupported("ORDER BY ... USING %s is not supported by the sidetrend endpoint", op)
			}
		}
		return c.expr(x.SortBy.Node)
	case *pg.Node_TypeCast:
		if err := checkType(x.TypeCast.TypeName); err != nil {
			return err
		}
		return c.expr(x.TypeCast.Arg)
	case *pg.Node_CollateClause:
		coll, _ := qualifiedName(x.CollateClause.Collname)
		if coll != "C" && coll != "POSIX" && coll != "default" {
			return notSupported("COLLATE %q is not supported: the endpoint compares text byte by byte (COLLATE \"C\")", coll)
		}
		return c.expr(x.CollateClause.Arg)
	case *pg.Node_AExpr:
		return c.aExpr(x.AExpr)
	case *pg.Node_BoolExpr:
		return c.exprs(x.BoolExpr.Args)
	case *pg.Node_NullTest:
		return c.expr(x.NullTest.Arg)
	case *pg.Node_BooleanTest:
		return c.expr(x.BooleanTest.Arg)
	case *pg.Node_CaseExpr:
		if err := c.expr(x.CaseExpr.Arg); err != nil {
			return err
		}
		if err := c.exprs(x.CaseExpr.Args); err != nil {
			return err
		}
		return c.expr(x.CaseExpr.Defresult)
	case *pg.Node_CaseWhen:
		if err := c.expr(x.CaseWhen.Expr); err != nil {
			return err
		}
		return c.expr(x.CaseWhen.Result)
	case *pg.Node_CoalesceExpr:
		return c.exprs(x.CoalesceExpr.Args)
	case *pg.Node_MinMaxExpr:
		return c.exprs(x.MinMaxExpr.Args)
	case *pg.Node_AArrayExpr:
		return c.exprs(x.AArrayExpr.Elements)
	case *pg.Node_FuncCall:
		return c.funcCall(x.FuncCall)
	case *pg.Node_SubLink:
		return notSupported("subqueries are not supported by the sidetrend endpoint").
			WithHint("run the subquery on the local side")
	}
	return notSupported("%s is not supported by the sidetrend endpoint", nodeName(n))
}

func (c *checker) aExpr(a *pg.A_Expr) error {
	switch a.Kind {
	case pg.A_Expr_Kind_AEXPR_OP, pg.A_Expr_Kind_AEXPR_OP_ANY, pg.A_Expr_Kind_AEXPR_OP_ALL,
		pg.A_Expr_Kind_AEXPR_DISTINCT, pg.A_Expr_Kind_AEXPR_NOT_DISTINCT, pg.A_Expr_Kind_AEXPR_NULLIF,
		pg.A_Expr_Kind_AEXPR_IN, pg.A_Expr_Kind_AEXPR_LIKE, pg.A_Expr_Kind_AEXPR_ILIKE, pg.A_Expr_Kind_AEXPR_SIMILAR,
		pg.A_Expr_Kind_AEXPR_BETWEEN, pg.A_Expr_Kind_AEXPR_NOT_BETWEEN,
		pg.A_Expr_Kind_AEXPR_BETWEEN_SYM, pg.A_Expr_Kind_AEXPR_NOT_BETWEEN_SYM:
	default:
		return notSupported("operator form %s is not supported by the sidetrend endpoint", a.Kind)
	}
	op, ok := qualifiedName(a.Name)
	if !ok || !allowedOperators[op] && a.Kind == pg.A_Expr_Kind_AEXPR_OP {
		return notSupported("operator %s is not supported by the sidetrend endpoint", op)
	}
	if err := c.expr(a.Lexpr); err != nil {
		return err
	}
	return c.expr(a.Rexpr)
}

func (c *checker) funcCall(f *pg.FuncCall) error {
	name, ok := qualifiedName(f.Funcname)
	if name == "pg_relation_size" {
		return notSupported("ANALYZE of sidetrend_live tables is not supported: the endpoint computes their rows on demand and has no size to sample").
			WithHint("leave the foreign tables unanalyzed; use_remote_estimate stays off")
	}
	if !ok || !allowedFunctions[name] {
		return notSupported("function %s is not supported by the sidetrend endpoint", name).
			WithHint("the endpoint runs built-in aggregates (count, sum, avg, min, max, ...) and immutable scalar functions; compute others on the local side")
	}
	if f.Over != nil {
		return notSupported("window functions are not supported by the sidetrend endpoint")
	}
	if f.FuncVariadic {
		return notSupported("VARIADIC calls are not supported by the sidetrend endpoint")
	}
	if err := c.exprs(f.Args); err != nil {
		return err
	}
	if err := c.exprs(f.AggOrder); err != nil {
		return err
	}
	return c.expr(f.AggFilter)
}

func checkType(t *pg.TypeName) error {
	if t == nil {
		return nil
	}
	name, ok := qualifiedName(t.Names)
	if !ok || !allowedTypes[name] || t.Setof || t.PctType {
		return notSupported("type %s is not supported by the sidetrend endpoint", name)
	}
	for _, m := range t.Typmods {
		if m.GetAConst() == nil {
			return notSupported("type modifiers of %s must be constants", name)
		}
	}
	return nil
}
