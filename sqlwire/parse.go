package sqlwire

import (
	"math"
	"math/big"
	"strconv"
	"strings"
)

// Supported lists what the endpoint runs, for error messages that say what
// to use instead.
const supportedStatements = "SELECT on sidetrend_live.forecast, backtest and series; " +
	"DECLARE ... CURSOR FOR SELECT, FETCH, MOVE, CLOSE; BEGIN, START TRANSACTION, COMMIT, " +
	"ROLLBACK, ABORT, SAVEPOINT, RELEASE, ROLLBACK TO; SET, RESET, SHOW; DEALLOCATE; DISCARD ALL"

// maxParseDepth bounds expression nesting so that hostile input cannot
// exhaust the stack.
const maxParseDepth = 200

// parseStatements parses a query string into its statements (a simple
// Query may hold several separated by semicolons). An empty string gives
// one emptyStmt.
func parseStatements(sql string) ([]stmt, error) {
	toks, err := lex(sql)
	if err != nil {
		return nil, err
	}
	var out []stmt
	start := 0
	for i, t := range toks {
		if t.is(tokPunct, ";") || t.kind == tokEOF {
			if i > start {
				p := &parser{toks: append(toks[start:i:i], token{kind: tokEOF, pos: t.pos}), sql: sql}
				s, err := p.statement()
				if err != nil {
					return nil, err
				}
				out = append(out, s)
			}
			start = i + 1
		}
	}
	if len(out) == 0 {
		out = append(out, &emptyStmt{})
	}
	return out, nil
}

// parseStatement parses exactly one statement (the extended protocol's
// Parse takes one).
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

type parser struct {
	toks  []token
	i     int
	sql   string
	depth int
}

func (p *parser) peek() token { return p.toks[p.i] }
func (p *parser) peekAt(k int) token {
	if p.i+k < len(p.toks) {
		return p.toks[p.i+k]
	}
	return p.toks[len(p.toks)-1]
}
func (p *parser) next() token {
	t := p.toks[p.i]
	if t.kind != tokEOF {
		p.i++
	}
	return t
}

// accept consumes the keyword w if it is next.
func (p *parser) accept(w string) bool {
	if p.peek().isKeyword(w) {
		p.i++
		return true
	}
	return false
}

func (p *parser) acceptPunct(s string) bool {
	if p.peek().is(tokPunct, s) {
		p.i++
		return true
	}
	return false
}

func (p *parser) expect(w string) error {
	if !p.accept(w) {
		return p.errExpected(strings.ToUpper(w))
	}
	return nil
}

func (p *parser) expectPunct(s string) error {
	if !p.acceptPunct(s) {
		return p.errExpected(`"` + s + `"`)
	}
	return nil
}

func (p *parser) errExpected(what string) error {
	t := p.peek()
	if t.kind == tokEOF {
		return syntaxErrorAt(t.pos, "syntax error at end of input: expected %s", what)
	}
	return syntaxErrorAt(t.pos, "syntax error at or near %q: expected %s", tokenText(p.sql, t), what)
}

func tokenText(sql string, t token) string {
	switch t.kind {
	case tokString:
		return quoteLiteral(t.text)
	case tokQIdent:
		return `"` + t.text + `"`
	case tokParam:
		return "$" + t.text
	}
	return t.text
}

func (p *parser) atEnd() bool { return p.peek().kind == tokEOF }

func (p *parser) expectEnd() error {
	if !p.atEnd() {
		t := p.peek()
		return syntaxErrorAt(t.pos, "syntax error at or near %q", tokenText(p.sql, t))
	}
	return nil
}

// ident reads an identifier (quoted or not).
func (p *parser) ident(what string) (string, error) {
	t := p.peek()
	if t.kind == tokIdent || t.kind == tokQIdent {
		p.i++
		return t.text, nil
	}
	return "", p.errExpected(what)
}

// writeVerbs are statements that change data or schema: refused as writes.
var writeVerbs = map[string]bool{
	"insert": true, "update": true, "delete": true, "merge": true, "truncate": true,
	"create": true, "drop": true, "alter": true, "grant": true, "revoke": true,
	"comment": true, "copy": true, "lock": true, "refresh": true, "reindex": true,
	"cluster": true, "vacuum": true, "import": true, "security": true, "call": true,
	"do": true, "notify": true,
}

func (p *parser) statement() (stmt, error) {
	t := p.peek()
	if t.kind != tokIdent {
		if t.is(tokPunct, "(") {
			return nil, notSupported("parenthesized queries are not supported: write a plain SELECT").withHint("supported: %s", supportedStatements)
		}
		return nil, p.errExpected("a statement")
	}
	switch t.text {
	case "select":
		s, err := p.selectStmt()
		if err != nil {
			return nil, err
		}
		return s, p.expectEnd()
	case "declare":
		return p.declare()
	case "fetch", "move":
		return p.fetch()
	case "close":
		return p.closeCursor()
	case "begin", "start", "commit", "end", "rollback", "abort", "savepoint", "release":
		return p.transaction()
	case "set":
		return p.set()
	case "reset":
		p.next()
		if p.accept("all") {
			return &setStmt{reset: true, all: true, resetCmd: true}, p.expectEnd()
		}
		name, err := p.paramName()
		if err != nil {
			return nil, err
		}
		return &setStmt{name: name, reset: true, resetCmd: true}, p.expectEnd()
	case "show":
		p.next()
		name, err := p.paramName()
		if err != nil {
			return nil, err
		}
		return &showStmt{name: name}, p.expectEnd()
	case "deallocate":
		p.next()
		p.accept("prepare")
		if p.accept("all") {
			return &deallocateStmt{all: true}, p.expectEnd()
		}
		name, err := p.ident("a prepared statement name")
		if err != nil {
			return nil, err
		}
		return &deallocateStmt{name: name}, p.expectEnd()
	case "discard":
		p.next()
		if err := p.expect("all"); err != nil {
			return nil, notSupported("only DISCARD ALL is supported")
		}
		return &discardStmt{}, p.expectEnd()
	case "explain":
		return nil, notSupported("EXPLAIN is not supported by the sidetrend endpoint").
			withHint("turn off use_remote_estimate on the foreign server or table: ALTER SERVER sidetrend_live OPTIONS (SET use_remote_estimate 'false')")
	case "analyze", "analyse":
		return nil, notSupported("ANALYZE is not supported: sidetrend_live tables are computed on demand and have no statistics to gather")
	case "with", "values", "table":
		return nil, notSupported("%s queries are not supported: write a plain SELECT from a sidetrend_live table", strings.ToUpper(t.text)).
			withHint("supported: %s", supportedStatements)
	}
	if writeVerbs[t.text] {
		return nil, errorf(codeReadOnly, "cannot execute %s: the sidetrend endpoint is read-only", strings.ToUpper(t.text)).
			withHint("supported: %s", supportedStatements)
	}
	return nil, notSupported("%s is not supported by the sidetrend endpoint", strings.ToUpper(t.text)).
		withHint("supported: %s", supportedStatements)
}

func (p *parser) declare() (stmt, error) {
	p.next()
	name, err := p.ident("a cursor name")
	if err != nil {
		return nil, err
	}
	for {
		switch {
		case p.accept("binary"):
			return nil, notSupported("binary cursors are not supported: declare the cursor without BINARY")
		case p.accept("asensitive"), p.accept("insensitive"):
		case p.accept("no"):
			if err := p.expect("scroll"); err != nil {
				return nil, err
			}
		case p.accept("scroll"):
			return nil, notSupported("scrollable cursors are not supported: declare the cursor with NO SCROLL")
		default:
			goto cursor
		}
	}
cursor:
	if err := p.expect("cursor"); err != nil {
		return nil, err
	}
	if p.accept("with") {
		if err := p.expect("hold"); err != nil {
			return nil, err
		}
		return nil, notSupported("WITH HOLD cursors are not supported: declare the cursor inside a transaction block")
	}
	if p.accept("without") {
		if err := p.expect("hold"); err != nil {
			return nil, err
		}
	}
	if err := p.expect("for"); err != nil {
		return nil, err
	}
	if !p.peek().isKeyword("select") {
		return nil, notSupported("a cursor must be declared FOR SELECT ... from a sidetrend_live table")
	}
	q, err := p.selectStmt()
	if err != nil {
		return nil, err
	}
	return &declareStmt{name: name, query: q}, p.expectEnd()
}

func (p *parser) fetch() (stmt, error) {
	move := p.next().text == "move"
	f := &fetchStmt{count: 1, move: move}
	verb := strings.ToUpper(p.toks[p.i-1].text)
	count := func() error {
		t := p.peek()
		if p.accept("all") {
			f.count = -1
			return nil
		}
		if t.kind == tokNumber {
			p.next()
			n, err := strconv.ParseInt(t.text, 10, 64)
			if err != nil || n < 0 {
				return notSupported("%s %s: only forward fetches with a non-negative whole count are supported", verb, t.text)
			}
			f.count = n
			return nil
		}
		if t.is(tokOp, "-") {
			return notSupported("%s with a negative count: the cursor can only scan forward", verb)
		}
		return nil
	}
	t := p.peek()
	switch {
	case p.accept("next"):
	case p.accept("forward"):
		if err := count(); err != nil {
			return nil, err
		}
	case t.isKeyword("all") || t.kind == tokNumber || t.is(tokOp, "-"):
		if err := count(); err != nil {
			return nil, err
		}
	case t.isKeyword("prior"), t.isKeyword("first"), t.isKeyword("last"), t.isKeyword("absolute"),
		t.isKeyword("relative"), t.isKeyword("backward"):
		return nil, errorf(codeObjectState, "cursor can only scan forward: %s %s is not supported", verb, strings.ToUpper(t.text)).
			withHint("use FETCH n or FETCH ALL")
	}
	if !p.accept("from") {
		p.accept("in")
	}
	name, err := p.ident("a cursor name")
	if err != nil {
		return nil, err
	}
	f.name = name
	return f, p.expectEnd()
}

func (p *parser) closeCursor() (stmt, error) {
	p.next()
	if p.accept("all") {
		return &closeStmt{all: true}, p.expectEnd()
	}
	name, err := p.ident("a cursor name")
	if err != nil {
		return nil, err
	}
	return &closeStmt{name: name}, p.expectEnd()
}

func (p *parser) transaction() (stmt, error) {
	verb := p.next().text
	switch verb {
	case "begin", "start":
		if verb == "start" {
			if err := p.expect("transaction"); err != nil {
				return nil, err
			}
		} else if !p.accept("work") {
			p.accept("transaction")
		}
		s := &txStmt{kind: txBegin, verb: verb}
		if err := p.txModes(s); err != nil {
			return nil, err
		}
		return s, p.expectEnd()
	case "commit", "end":
		if !p.accept("work") {
			p.accept("transaction")
		}
		if err := p.noChain(); err != nil {
			return nil, err
		}
		return &txStmt{kind: txCommit}, p.expectEnd()
	case "rollback", "abort":
		if !p.accept("work") {
			p.accept("transaction")
		}
		if verb == "rollback" && p.accept("to") {
			p.accept("savepoint")
			name, err := p.ident("a savepoint name")
			if err != nil {
				return nil, err
			}
			return &txStmt{kind: txRollbackTo, name: name}, p.expectEnd()
		}
		if err := p.noChain(); err != nil {
			return nil, err
		}
		return &txStmt{kind: txRollback}, p.expectEnd()
	case "savepoint":
		name, err := p.ident("a savepoint name")
		if err != nil {
			return nil, err
		}
		return &txStmt{kind: txSavepoint, name: name}, p.expectEnd()
	case "release":
		p.accept("savepoint")
		name, err := p.ident("a savepoint name")
		if err != nil {
			return nil, err
		}
		return &txStmt{kind: txRelease, name: name}, p.expectEnd()
	}
	return nil, p.errExpected("a transaction statement")
}

func (p *parser) noChain() error {
	if p.accept("and") {
		if p.accept("no") {
			return p.expect("chain")
		}
		if p.accept("chain") {
			return notSupported("AND CHAIN is not supported: start the next transaction with BEGIN")
		}
		return p.errExpected("CHAIN or NO CHAIN")
	}
	return nil
}

// txModes reads ISOLATION LEVEL ..., READ ONLY/WRITE, [NOT] DEFERRABLE,
// separated by commas or spaces. All are accepted: the endpoint's data is
// computed per statement and never written.
func (p *parser) txModes(s *txStmt) error {
	for !p.atEnd() {
		switch {
		case p.accept("isolation"):
			if err := p.expect("level"); err != nil {
				return err
			}
			switch {
			case p.accept("serializable"):
			case p.accept("repeatable"):
				if err := p.expect("read"); err != nil {
					return err
				}
			case p.accept("read"):
				if !p.accept("committed") && !p.accept("uncommitted") {
					return p.errExpected("COMMITTED or UNCOMMITTED")
				}
			default:
				return p.errExpected("an isolation level")
			}
		case p.accept("read"):
			if p.accept("only") {
				s.readOnly = true
			} else if !p.accept("write") {
				return p.errExpected("ONLY or WRITE")
			}
		case p.accept("not"):
			if err := p.expect("deferrable"); err != nil {
				return err
			}
		case p.accept("deferrable"):
		default:
			return p.errExpected("a transaction mode")
		}
		p.acceptPunct(",")
	}
	return nil
}

// paramName reads a configuration parameter name, which may be dotted
// (postgres_fdw.application_name).
func (p *parser) paramName() (string, error) {
	name, err := p.ident("a parameter name")
	if err != nil {
		return "", err
	}
	for p.acceptPunct(".") {
		part, err := p.ident("a parameter name")
		if err != nil {
			return "", err
		}
		name += "." + part
	}
	return strings.ToLower(name), nil
}

func (p *parser) set() (stmt, error) {
	p.next()
	s := &setStmt{}
	if p.accept("local") {
		s.local = true
	} else {
		p.accept("session")
	}
	if p.accept("transaction") || p.peek().isKeyword("characteristics") {
		if p.accept("characteristics") {
			return nil, notSupported("SET SESSION CHARACTERISTICS is not supported")
		}
		s.tx = true
		if err := p.txModes(&txStmt{}); err != nil {
			return nil, err
		}
		return s, p.expectEnd()
	}
	if p.accept("time") {
		if err := p.expect("zone"); err != nil {
			return nil, err
		}
		s.name = "timezone"
		if p.accept("local") || p.accept("default") {
			s.reset = true
			return s, p.expectEnd()
		}
		v, err := p.setValue()
		if err != nil {
			return nil, err
		}
		s.value = v
		return s, p.expectEnd()
	}
	name, err := p.paramName()
	if err != nil {
		return nil, err
	}
	s.name = name
	if !p.accept("to") && !p.peek().is(tokOp, "=") {
		return nil, p.errExpected("TO or =")
	}
	if p.peek().is(tokOp, "=") {
		p.next()
	}
	if p.accept("default") {
		s.reset = true
		return s, p.expectEnd()
	}
	var parts []string
	for {
		v, err := p.setValue()
		if err != nil {
			return nil, err
		}
		parts = append(parts, v)
		if !p.acceptPunct(",") {
			break
		}
	}
	s.value = strings.Join(parts, ", ")
	return s, p.expectEnd()
}

// setValue reads one value of SET: a word, a quoted string or a number.
func (p *parser) setValue() (string, error) {
	t := p.next()
	switch t.kind {
	case tokIdent, tokQIdent, tokString, tokNumber:
		return t.text, nil
	case tokOp:
		if t.text == "-" || t.text == "+" {
			n := p.next()
			if n.kind == tokNumber {
				return t.text + n.text, nil
			}
		}
	}
	p.i--
	return "", p.errExpected("a value")
}

// selectStmt parses the SELECT subset.
func (p *parser) selectStmt() (*selectStmt, error) {
	start := p.peek().pos
	if err := p.expect("select"); err != nil {
		return nil, err
	}
	s := &selectStmt{}
	if p.accept("distinct") {
		return nil, notSupported("SELECT DISTINCT is not supported: select the rows and use DISTINCT on the local side")
	}
	p.accept("all")
	for {
		if p.peek().is(tokOp, "*") {
			p.next()
			s.targets = append(s.targets, target{star: "*"})
			if !p.acceptPunct(",") {
				break
			}
			continue
		}
		if t := p.peek(); (t.kind == tokIdent || t.kind == tokQIdent) && p.peekAt(1).is(tokPunct, ".") && p.peekAt(2).is(tokOp, "*") {
			p.i += 3
			s.targets = append(s.targets, target{star: t.text})
			if !p.acceptPunct(",") {
				break
			}
			continue
		}
		x, err := p.expr()
		if err != nil {
			return nil, err
		}
		tg := target{x: x}
		if p.accept("as") {
			if tg.alias, err = p.ident("a column alias"); err != nil {
				return nil, err
			}
		} else if t := p.peek(); t.kind == tokQIdent || t.kind == tokIdent && !clauseWord[t.text] {
			tg.alias = p.next().text
		}
		s.targets = append(s.targets, tg)
		if !p.acceptPunct(",") {
			break
		}
	}
	if p.accept("into") {
		return nil, errorf(codeReadOnly, "SELECT INTO creates a table: the sidetrend endpoint is read-only")
	}
	if p.accept("from") {
		if err := p.fromClause(s); err != nil {
			return nil, err
		}
	}
	if p.accept("where") {
		x, err := p.expr()
		if err != nil {
			return nil, err
		}
		s.where = x
	}
	if p.accept("group") {
		if err := p.expect("by"); err != nil {
			return nil, err
		}
		for {
			x, err := p.expr()
			if err != nil {
				return nil, err
			}
			s.groupBy = append(s.groupBy, x)
			if !p.acceptPunct(",") {
				break
			}
		}
	}
	if p.accept("having") {
		x, err := p.expr()
		if err != nil {
			return nil, err
		}
		s.having = x
	}
	if p.accept("order") {
		if err := p.expect("by"); err != nil {
			return nil, err
		}
		for {
			it, err := p.sortItem()
			if err != nil {
				return nil, err
			}
			s.orderBy = append(s.orderBy, it)
			if !p.acceptPunct(",") {
				break
			}
		}
	}
	for {
		switch {
		case p.accept("limit"):
			if s.limit != nil {
				return nil, p.errExpected("one LIMIT")
			}
			if p.accept("all") {
				s.limit = &constExpr{v: nullOf(tInt8)}
				continue
			}
			x, err := p.expr()
			if err != nil {
				return nil, err
			}
			s.limit = x
		case p.accept("offset"):
			if s.offset != nil {
				return nil, p.errExpected("one OFFSET")
			}
			x, err := p.expr()
			if err != nil {
				return nil, err
			}
			p.accept("rows")
			p.accept("row")
			s.offset = x
		default:
			goto locks
		}
	}
locks:
	if p.peek().isKeyword("for") || p.peek().isKeyword("fetch") {
		return nil, notSupported("row locks and FETCH FIRST are not supported: sidetrend_live rows are computed, so there is nothing to lock; remove FOR UPDATE / FOR SHARE")
	}
	end := p.peek().pos
	s.text = strings.TrimSpace(p.sql[start:end])
	return s, nil
}

// clauseWord are the words that end a target list item without AS.
var clauseWord = map[string]bool{
	"from": true, "where": true, "group": true, "having": true, "order": true,
	"limit": true, "offset": true, "for": true, "into": true, "fetch": true,
	"union": true, "intersect": true, "except": true, "window": true,
}

func (p *parser) fromClause(s *selectStmt) error {
	if p.peek().is(tokPunct, "(") {
		// postgres_fdw writes a pushed-down join as (a r1 INNER JOIN b r2 ON (...)).
		p.next()
		if err := p.joinClause(s); err != nil {
			return err
		}
		return p.expectPunct(")")
	}
	tr, err := p.tableRef()
	if err != nil {
		return err
	}
	s.from = append(s.from, tr)
	if p.peek().isKeyword("inner") || p.peek().isKeyword("left") || p.peek().isKeyword("join") ||
		p.peek().isKeyword("right") || p.peek().isKeyword("full") || p.peek().isKeyword("cross") {
		return p.joinRest(s)
	}
	if p.acceptPunct(",") {
		return notSupported("several tables in FROM are not supported: join sidetrend_live tables on the local side")
	}
	return nil
}

func (p *parser) joinClause(s *selectStmt) error {
	if p.peek().is(tokPunct, "(") {
		return notSupported("joins of more than two sidetrend_live tables are not supported remotely").
			withHint("join them on the local side, for example through a subquery with OFFSET 0")
	}
	tr, err := p.tableRef()
	if err != nil {
		return err
	}
	s.from = append(s.from, tr)
	return p.joinRest(s)
}

func (p *parser) joinRest(s *selectStmt) error {
	j := &joinSpec{kind: "inner"}
	switch {
	case p.accept("inner"):
	case p.accept("left"):
		j.kind = "left"
		p.accept("outer")
	case p.accept("right"):
		j.kind = "right"
		p.accept("outer")
	case p.accept("full"):
		j.kind = "full"
		p.accept("outer")
	case p.accept("cross"):
		j.kind = "cross"
	}
	if err := p.expect("join"); err != nil {
		return err
	}
	if p.peek().is(tokPunct, "(") {
		return notSupported("joins of more than two sidetrend_live tables are not supported remotely").
			withHint("join them on the local side, for example through a subquery with OFFSET 0")
	}
	tr, err := p.tableRef()
	if err != nil {
		return err
	}
	s.from = append(s.from, tr)
	if j.kind != "cross" {
		if err := p.expect("on"); err != nil {
			return err
		}
		on, err := p.expr()
		if err != nil {
			return err
		}
		j.on = on
	} else {
		j.kind = "inner"
	}
	s.join = j
	return nil
}

func (p *parser) tableRef() (*tableRef, error) {
	pos := p.peek().pos
	name, err := p.ident("a table name")
	if err != nil {
		return nil, err
	}
	tr := &tableRef{name: name, pos: pos}
	if p.acceptPunct(".") {
		tr.schema = name
		if tr.name, err = p.ident("a table name"); err != nil {
			return nil, err
		}
		if p.peek().is(tokPunct, ".") {
			return nil, notSupported("cross-database references are not supported: name the table as sidetrend_live.<table>")
		}
	}
	if p.peek().is(tokPunct, "(") {
		return nil, notSupported("functions in FROM are not supported: select from sidetrend_live.forecast, backtest or series")
	}
	if p.accept("as") {
		if tr.alias, err = p.ident("a table alias"); err != nil {
			return nil, err
		}
	} else if t := p.peek(); t.kind == tokQIdent || t.kind == tokIdent && !clauseWord[t.text] && !joinWord[t.text] && t.text != "tablesample" {
		tr.alias = p.next().text
	}
	if p.accept("tablesample") {
		return nil, notSupported("TABLESAMPLE is not supported: sidetrend_live tables are computed on demand and cannot be sampled")
	}
	return tr, nil
}

var joinWord = map[string]bool{
	"inner": true, "left": true, "right": true, "full": true, "cross": true, "join": true,
	"on": true, "natural": true, "using": true, "outer": true,
}

func (p *parser) sortItem() (sortItem, error) {
	x, err := p.expr()
	if err != nil {
		return sortItem{}, err
	}
	it := sortItem{x: x}
	switch {
	case p.accept("asc"):
	case p.accept("desc"):
		it.desc = true
	case p.accept("using"):
		op := p.next()
		switch {
		case op.is(tokOp, "<"):
		case op.is(tokOp, ">"):
			it.desc = true
		default:
			return it, notSupported("ORDER BY ... USING %s is not supported: use ASC or DESC", op.text)
		}
	}
	it.nullsFirst = it.desc // Postgres' default: NULLs sort as larger than any value
	if p.accept("nulls") {
		switch {
		case p.accept("first"):
			it.nullsFirst = true
		case p.accept("last"):
			it.nullsFirst = false
		default:
			return it, p.errExpected("FIRST or LAST")
		}
	}
	return it, nil
}

// Expressions, by Postgres' precedence (gram.y, lowest first): OR, AND,
// NOT, IS, comparison, BETWEEN/IN/LIKE, other operators, + -, * / %, ^,
// unary minus, [ ], ::.

func (p *parser) expr() (expr, error) {
	p.depth++
	defer func() { p.depth-- }()
	if p.depth > maxParseDepth {
		return nil, errorf("54001", "expression is nested too deeply: at most %d levels are accepted", maxParseDepth)
	}
	return p.orExpr()
}

func (p *parser) orExpr() (expr, error) {
	x, err := p.andExpr()
	if err != nil {
		return nil, err
	}
	if !p.peek().isKeyword("or") {
		return x, nil
	}
	b := &boolExpr{op: "or", args: []expr{x}}
	for p.accept("or") {
		y, err := p.andExpr()
		if err != nil {
			return nil, err
		}
		b.args = append(b.args, y)
	}
	return b, nil
}

func (p *parser) andExpr() (expr, error) {
	x, err := p.notExpr()
	if err != nil {
		return nil, err
	}
	if !p.peek().isKeyword("and") {
		return x, nil
	}
	b := &boolExpr{op: "and", args: []expr{x}}
	for p.accept("and") {
		y, err := p.notExpr()
		if err != nil {
			return nil, err
		}
		b.args = append(b.args, y)
	}
	return b, nil
}

func (p *parser) notExpr() (expr, error) {
	if p.accept("not") {
		p.depth++
		defer func() { p.depth-- }()
		if p.depth > maxParseDepth {
			return nil, errorf("54001", "expression is nested too deeply: at most %d levels are accepted", maxParseDepth)
		}
		x, err := p.notExpr()
		if err != nil {
			return nil, err
		}
		return &boolExpr{op: "not", args: []expr{x}}, nil
	}
	return p.isExpr()
}

func (p *parser) isExpr() (expr, error) {
	x, err := p.cmpExpr()
	if err != nil {
		return nil, err
	}
	for {
		switch {
		case p.accept("isnull"):
			x = &nullTest{x: x}
		case p.accept("notnull"):
			x = &nullTest{x: x, not: true}
		case p.accept("is"):
			not := p.accept("not")
			switch {
			case p.accept("null"):
				x = &nullTest{x: x, not: not}
			case p.accept("distinct"):
				if err := p.expect("from"); err != nil {
					return nil, err
				}
				y, err := p.cmpExpr()
				if err != nil {
					return nil, err
				}
				x = &distinctExpr{l: x, r: y, not: not}
			case p.accept("true"):
				x = &boolTest{x: x, what: "true", not: not}
			case p.accept("false"):
				x = &boolTest{x: x, what: "false", not: not}
			case p.accept("unknown"):
				x = &boolTest{x: x, what: "unknown", not: not}
			default:
				return nil, p.errExpected("NULL, DISTINCT FROM, TRUE, FALSE or UNKNOWN")
			}
		default:
			return x, nil
		}
	}
}

var cmpOps = map[string]bool{"=": true, "<>": true, "<": true, "<=": true, ">": true, ">=": true}

func (p *parser) cmpExpr() (expr, error) {
	x, err := p.bilExpr()
	if err != nil {
		return nil, err
	}
	t := p.peek()
	if t.kind == tokOp && cmpOps[t.text] {
		p.next()
		return p.rightOperand(t.text, x, t.pos, p.bilExpr)
	}
	return x, nil
}

// rightOperand reads the right side of operator op: op ANY/ALL/SOME (array)
// or a plain operand read by sub.
func (p *parser) rightOperand(op string, l expr, pos int, sub func() (expr, error)) (expr, error) {
	if (p.peek().isKeyword("any") || p.peek().isKeyword("some") || p.peek().isKeyword("all")) && p.peekAt(1).is(tokPunct, "(") {
		any := !p.next().isKeyword("all")
		p.next()
		if p.peek().isKeyword("select") {
			return nil, notSupported("subqueries are not supported: give the values as an array")
		}
		r, err := p.expr()
		if err != nil {
			return nil, err
		}
		if err := p.expectPunct(")"); err != nil {
			return nil, err
		}
		return &arrayOpExpr{op: op, any: any, l: l, r: r, pos: pos}, nil
	}
	r, err := sub()
	if err != nil {
		return nil, err
	}
	return &opExpr{op: op, l: l, r: r, pos: pos}, nil
}

// bilExpr handles BETWEEN, IN and LIKE.
func (p *parser) bilExpr() (expr, error) {
	x, err := p.otherOpExpr()
	if err != nil {
		return nil, err
	}
	for {
		save := p.i
		not := p.accept("not")
		pos := p.peek().pos
		switch {
		case p.accept("between"):
			if p.accept("symmetric") {
				return nil, notSupported("BETWEEN SYMMETRIC is not supported: write two comparisons")
			}
			p.accept("asymmetric")
			lo, err := p.otherOpExpr()
			if err != nil {
				return nil, err
			}
			if err := p.expect("and"); err != nil {
				return nil, err
			}
			hi, err := p.otherOpExpr()
			if err != nil {
				return nil, err
			}
			// Postgres rewrites BETWEEN to the same pair of comparisons.
			var b expr = &boolExpr{op: "and", args: []expr{
				&opExpr{op: ">=", l: x, r: lo, pos: pos}, &opExpr{op: "<=", l: x, r: hi, pos: pos}}}
			if not {
				b = &boolExpr{op: "or", args: []expr{
					&opExpr{op: "<", l: x, r: lo, pos: pos}, &opExpr{op: ">", l: x, r: hi, pos: pos}}}
			}
			x = b
		case p.accept("in"):
			if err := p.expectPunct("("); err != nil {
				return nil, err
			}
			if p.peek().isKeyword("select") {
				return nil, notSupported("IN (SELECT ...) is not supported: list the values")
			}
			arr := &arrayExpr{pos: pos}
			for {
				e, err := p.expr()
				if err != nil {
					return nil, err
				}
				arr.elems = append(arr.elems, e)
				if !p.acceptPunct(",") {
					break
				}
			}
			if err := p.expectPunct(")"); err != nil {
				return nil, err
			}
			if not {
				x = &arrayOpExpr{op: "<>", any: false, l: x, r: arr, pos: pos}
			} else {
				x = &arrayOpExpr{op: "=", any: true, l: x, r: arr, pos: pos}
			}
		case p.accept("like"):
			r, err := p.otherOpExpr()
			if err != nil {
				return nil, err
			}
			if p.accept("escape") {
				return nil, notSupported("LIKE ... ESCAPE is not supported: use the default backslash escape")
			}
			op := "~~"
			if not {
				op = "!~~"
			}
			x = &opExpr{op: op, l: x, r: r, pos: pos}
		case p.accept("ilike"), p.accept("similar"):
			return nil, notSupported("ILIKE and SIMILAR TO are not supported remotely: use LIKE")
		default:
			p.i = save
			return x, nil
		}
	}
}

// otherOps are the other operators the subset knows (LIKE as ~~).
var otherOps = map[string]bool{"~~": true, "!~~": true}

func (p *parser) otherOpExpr() (expr, error) {
	x, err := p.addExpr()
	if err != nil {
		return nil, err
	}
	for {
		t := p.peek()
		op := ""
		switch {
		case t.kind == tokOp && otherOps[t.text]:
			p.next()
			op = t.text
		case t.kind == tokOp && !cmpOps[t.text] && !strings.Contains("+-*/%^", t.text):
			return nil, notSupported("operator %s is not supported", t.text).
				withHint("conditions may use = <> < <= > >= LIKE IN BETWEEN IS NULL AND OR NOT and arithmetic")
		case t.isKeyword("operator") && p.peekAt(1).is(tokPunct, "("):
			p.next()
			o, err := p.qualifiedOperator()
			if err != nil {
				return nil, err
			}
			op = o
		default:
			return x, nil
		}
		if cmpOps[op] {
			// OPERATOR(pg_catalog.=) and friends keep their meaning.
			r, err := p.rightOperand(op, x, t.pos, p.addExpr)
			if err != nil {
				return nil, err
			}
			x = r
			continue
		}
		if strings.Contains("+-*/%", op) && len(op) == 1 {
			r, err := p.addExpr()
			if err != nil {
				return nil, err
			}
			x = &opExpr{op: op, l: x, r: r, pos: t.pos}
			continue
		}
		r, err := p.addExpr()
		if err != nil {
			return nil, err
		}
		x = &opExpr{op: op, l: x, r: r, pos: t.pos}
	}
}

// qualifiedOperator reads (schema.op) after OPERATOR; only pg_catalog
// operators of the subset are understood.
func (p *parser) qualifiedOperator() (string, error) {
	if err := p.expectPunct("("); err != nil {
		return "", err
	}
	schema, err := p.ident("an operator schema")
	if err != nil {
		return "", err
	}
	if err := p.expectPunct("."); err != nil {
		return "", err
	}
	t := p.next()
	if t.kind != tokOp {
		return "", p.errExpected("an operator")
	}
	if err := p.expectPunct(")"); err != nil {
		return "", err
	}
	if schema != "pg_catalog" || !(cmpOps[t.text] || otherOps[t.text] || len(t.text) == 1 && strings.Contains("+-*/%", t.text)) {
		return "", notSupported("operator OPERATOR(%s.%s) is not supported: the endpoint knows only the built-in comparison, LIKE and arithmetic operators", schema, t.text)
	}
	return t.text, nil
}

func (p *parser) addExpr() (expr, error) {
	x, err := p.mulExpr()
	if err != nil {
		return nil, err
	}
	for {
		t := p.peek()
		if !(t.is(tokOp, "+") || t.is(tokOp, "-")) {
			return x, nil
		}
		p.next()
		y, err := p.mulExpr()
		if err != nil {
			return nil, err
		}
		x = &opExpr{op: t.text, l: x, r: y, pos: t.pos}
	}
}

func (p *parser) mulExpr() (expr, error) {
	x, err := p.powExpr()
	if err != nil {
		return nil, err
	}
	for {
		t := p.peek()
		if !(t.is(tokOp, "*") || t.is(tokOp, "/") || t.is(tokOp, "%")) {
			return x, nil
		}
		p.next()
		y, err := p.powExpr()
		if err != nil {
			return nil, err
		}
		x = &opExpr{op: t.text, l: x, r: y, pos: t.pos}
	}
}

func (p *parser) powExpr() (expr, error) {
	x, err := p.unaryExpr()
	if err != nil {
		return nil, err
	}
	if t := p.peek(); t.is(tokOp, "^") {
		return nil, notSupported("operator ^ is not supported")
	}
	return x, nil
}

func (p *parser) unaryExpr() (expr, error) {
	t := p.peek()
	if t.is(tokOp, "-") || t.is(tokOp, "+") {
		p.next()
		p.depth++
		defer func() { p.depth-- }()
		if p.depth > maxParseDepth {
			return nil, errorf("54001", "expression is nested too deeply: at most %d levels are accepted", maxParseDepth)
		}
		// A minus in front of a number literal is part of the literal, as
		// in Postgres' grammar (doNegate), so -2147483648 is an integer.
		if n := p.peek(); t.text == "-" && n.kind == tokNumber {
			p.next()
			c, err := numberConst("-"+n.text, n.pos)
			if err != nil {
				return nil, err
			}
			return p.postfix(c)
		}
		x, err := p.unaryExpr()
		if err != nil {
			return nil, err
		}
		if t.text == "+" {
			return x, nil
		}
		return &opExpr{op: "-", r: x, pos: t.pos}, nil
	}
	x, err := p.primary()
	if err != nil {
		return nil, err
	}
	return p.postfix(x)
}

// postfix applies :: casts and rejects subscripts.
func (p *parser) postfix(x expr) (expr, error) {
	for {
		t := p.peek()
		switch {
		case t.is(tokPunct, "::"):
			p.next()
			c, err := p.typeName(x, t.pos)
			if err != nil {
				return nil, err
			}
			x = c
		case t.is(tokPunct, "["):
			return nil, notSupported("array subscripts are not supported")
		case t.isKeyword("collate"):
			return nil, notSupported("COLLATE is not supported: sidetrend_live text columns compare byte-wise (collation \"C\")")
		case t.isKeyword("at") && p.peekAt(1).isKeyword("time"):
			return nil, notSupported("AT TIME ZONE is not supported remotely")
		default:
			return x, nil
		}
	}
}

// typeName reads a type after :: or CAST(... AS and wraps x in a cast.
func (p *parser) typeName(x expr, pos int) (*castExpr, error) {
	start := p.peek()
	name, err := p.ident("a type name")
	if err != nil {
		return nil, err
	}
	if p.peek().is(tokPunct, ".") && name == "pg_catalog" {
		p.next()
		if name, err = p.ident("a type name"); err != nil {
			return nil, err
		}
	} else if p.peek().is(tokPunct, ".") {
		return nil, notSupported("type %s.%s is not supported", name, p.peekAt(1).text)
	}
	switch name {
	case "double":
		if err := p.expect("precision"); err != nil {
			return nil, err
		}
		name = "double precision"
	case "character":
		if p.accept("varying") {
			name = "character varying"
		}
	case "timestamp", "time":
		switch {
		case p.accept("with"):
			if err := p.expect("time"); err != nil {
				return nil, err
			}
			if err := p.expect("zone"); err != nil {
				return nil, err
			}
			name += " with time zone"
		case p.accept("without"):
			if err := p.expect("time"); err != nil {
				return nil, err
			}
			if err := p.expect("zone"); err != nil {
				return nil, err
			}
			name += " without time zone"
		}
	}
	t, ok := typeNames[name]
	if !ok {
		return nil, notSupported("type %s is not supported", name).withDetail("position %d", start.pos+1).
			withHint("the endpoint knows text, boolean, smallint, integer, bigint, real, double precision, numeric and timestamp with time zone")
	}
	c := &castExpr{x: x, t: t, prec: -1, scale: -1, pos: pos}
	if p.acceptPunct("(") {
		// A typmod: numeric(p,s) rounds; varchar(n) and char(n) limit length,
		// which the endpoint does not model.
		if t != tNumeric {
			return nil, notSupported("type modifiers on %s are not supported", name)
		}
		prec, err := p.smallInt()
		if err != nil {
			return nil, err
		}
		scale := 0
		if p.acceptPunct(",") {
			if scale, err = p.smallInt(); err != nil {
				return nil, err
			}
		}
		if err := p.expectPunct(")"); err != nil {
			return nil, err
		}
		if prec < 1 || prec > 1000 || scale < 0 || scale > prec {
			return nil, errorf(codeInvalidParameter, "NUMERIC(%d,%d) is not a valid type: precision must be 1 to 1000 and scale 0 to the precision", prec, scale)
		}
		c.prec, c.scale = prec, scale
	}
	if p.acceptPunct("[") {
		if err := p.expectPunct("]"); err != nil {
			return nil, err
		}
		c.array = true
	}
	return c, nil
}

func (p *parser) smallInt() (int, error) {
	t := p.next()
	if t.kind != tokNumber {
		p.i--
		return 0, p.errExpected("a number")
	}
	n, err := strconv.Atoi(t.text)
	if err != nil {
		return 0, syntaxErrorAt(t.pos, "%s is not a whole number", t.text)
	}
	return n, nil
}

func (p *parser) primary() (expr, error) {
	t := p.peek()
	switch t.kind {
	case tokNumber:
		p.next()
		return numberConst(t.text, t.pos)
	case tokString:
		p.next()
		return &constExpr{v: value{t: tUnknown, s: t.text}, pos: t.pos}, nil
	case tokParam:
		p.next()
		n, err := strconv.Atoi(t.text)
		if err != nil || n < 1 || n > math.MaxUint16 {
			return nil, syntaxErrorAt(t.pos, "parameter $%s is out of range: parameters are $1 to $65535", t.text)
		}
		return &paramExpr{n: n, pos: t.pos}, nil
	case tokPunct:
		if t.text == "(" {
			p.next()
			if p.peek().isKeyword("select") {
				return nil, notSupported("subqueries are not supported")
			}
			x, err := p.expr()
			if err != nil {
				return nil, err
			}
			if p.peek().is(tokPunct, ",") {
				return nil, notSupported("row constructors are not supported")
			}
			if err := p.expectPunct(")"); err != nil {
				return nil, err
			}
			return x, nil
		}
	case tokQIdent:
		return p.nameExpr()
	case tokIdent:
		switch t.text {
		case "null":
			p.next()
			return &constExpr{v: nullOf(tNull), pos: t.pos}, nil
		case "true", "false":
			p.next()
			return &constExpr{v: boolVal(t.text == "true"), pos: t.pos}, nil
		case "array":
			p.next()
			return p.arrayLiteral(t.pos)
		case "case":
			p.next()
			return p.caseExpr()
		case "cast":
			p.next()
			if err := p.expectPunct("("); err != nil {
				return nil, err
			}
			x, err := p.expr()
			if err != nil {
				return nil, err
			}
			if err := p.expect("as"); err != nil {
				return nil, err
			}
			c, err := p.typeName(x, t.pos)
			if err != nil {
				return nil, err
			}
			return c, p.expectPunct(")")
		case "exists":
			return nil, notSupported("EXISTS subqueries are not supported remotely")
		case "row":
			return nil, notSupported("row constructors are not supported")
		case "interval", "time":
			if p.peekAt(1).kind == tokString {
				return nil, notSupported("type %s is not supported: compare period_start with a timestamp with time zone", t.text)
			}
		case "date", "timestamptz", "timestamp", "double", "integer", "int", "int4", "int8", "bigint",
			"text", "numeric", "boolean", "float8", "real", "smallint", "varchar":
			// typename 'literal', as in timestamptz '2024-01-05 00:00:00+00'.
			if k := p.literalTypeWords(); k > 0 && p.peekAt(k).kind == tokString {
				lit := p.peekAt(k)
				c, err := p.typeName(&constExpr{v: value{t: tUnknown, s: lit.text}, pos: lit.pos}, t.pos)
				if err != nil {
					return nil, err
				}
				p.next() // the literal
				return c, nil
			}
		}
		if reservedExprWord[t.text] {
			return nil, p.errExpected("an expression")
		}
		return p.nameExpr()
	}
	return nil, p.errExpected("an expression")
}

// literalTypeWords reports how many tokens the type name at the cursor
// spans when it is followed by a string literal, or 0.
func (p *parser) literalTypeWords() int {
	t := p.peek()
	switch t.text {
	case "double":
		if p.peekAt(1).isKeyword("precision") {
			return 2
		}
		return 0
	case "timestamp":
		if p.peekAt(1).isKeyword("with") && p.peekAt(2).isKeyword("time") && p.peekAt(3).isKeyword("zone") {
			return 4
		}
		if p.peekAt(1).isKeyword("without") {
			return 4
		}
	}
	return 1
}

var reservedExprWord = map[string]bool{
	"from": true, "where": true, "select": true, "and": true, "or": true, "group": true,
	"order": true, "having": true, "limit": true, "offset": true, "as": true, "on": true,
	"then": true, "else": true, "end": true, "when": true, "is": true, "in": true,
	"between": true, "like": true, "not": true, "for": true, "join": true,
}

// nameExpr reads a column reference or a function call.
func (p *parser) nameExpr() (expr, error) {
	t := p.next()
	name := t.text
	rel := ""
	if p.peek().is(tokPunct, ".") {
		p.next()
		n := p.next()
		switch {
		case n.kind == tokIdent || n.kind == tokQIdent:
			rel, name = name, n.text
		case n.is(tokOp, "*"):
			return nil, notSupported("%s.* is not supported: list the columns", name)
		default:
			p.i--
			return nil, p.errExpected("a column name")
		}
		if p.peek().is(tokPunct, ".") {
			return nil, notSupported("three-part names are not supported")
		}
	}
	if p.peek().is(tokPunct, "(") {
		if rel != "" && rel != "pg_catalog" {
			return nil, notSupported("function %s.%s is not supported", rel, name)
		}
		switch name {
		case "pg_relation_size", "pg_total_relation_size", "pg_table_size":
			// postgres_fdw's ANALYZE asks for the table's size first.
			return nil, notSupported("ANALYZE of sidetrend_live tables is not supported: their rows are computed on demand, so there is nothing to sample").
				withHint("leave the foreign tables unanalyzed; the planner's defaults are fine for them")
		}
		return p.call(name, t.pos)
	}
	if t.kind == tokIdent && rel == "" && (name == "current_timestamp" || name == "current_date" || name == "localtimestamp") {
		return nil, notSupported("%s is not supported remotely", strings.ToUpper(name))
	}
	return &colRef{rel: rel, name: name, pos: t.pos}, nil
}

func (p *parser) call(name string, pos int) (expr, error) {
	p.next() // (
	f := &funcCall{name: name, pos: pos}
	if p.peek().is(tokOp, "*") {
		p.next()
		f.star = true
	} else if !p.peek().is(tokPunct, ")") {
		if p.accept("distinct") {
			f.distinct = true
		} else {
			p.accept("all")
		}
		if p.peek().isKeyword("variadic") {
			return nil, notSupported("VARIADIC arguments are not supported")
		}
		for {
			x, err := p.expr()
			if err != nil {
				return nil, err
			}
			f.args = append(f.args, x)
			if !p.acceptPunct(",") {
				break
			}
		}
		if p.accept("order") {
			return nil, notSupported("ORDER BY inside %s(...) is not supported", name)
		}
	}
	if err := p.expectPunct(")"); err != nil {
		return nil, err
	}
	if p.accept("within") {
		return nil, notSupported("ordered-set aggregates (WITHIN GROUP) are not supported remotely")
	}
	if p.accept("filter") {
		if err := p.expectPunct("("); err != nil {
			return nil, err
		}
		if err := p.expect("where"); err != nil {
			return nil, err
		}
		x, err := p.expr()
		if err != nil {
			return nil, err
		}
		if err := p.expectPunct(")"); err != nil {
			return nil, err
		}
		f.filter = x
	}
	if p.peek().isKeyword("over") {
		return nil, notSupported("window functions are not supported remotely")
	}
	return f, nil
}

func (p *parser) arrayLiteral(pos int) (expr, error) {
	if p.peek().is(tokPunct, "(") {
		return nil, notSupported("ARRAY(subquery) is not supported: list the values in ARRAY[...]")
	}
	if err := p.expectPunct("["); err != nil {
		return nil, err
	}
	a := &arrayExpr{pos: pos}
	if p.acceptPunct("]") {
		return a, nil
	}
	for {
		if p.peek().is(tokPunct, "[") {
			return nil, notSupported("multidimensional arrays are not supported")
		}
		x, err := p.expr()
		if err != nil {
			return nil, err
		}
		a.elems = append(a.elems, x)
		if !p.acceptPunct(",") {
			break
		}
	}
	return a, p.expectPunct("]")
}

func (p *parser) caseExpr() (expr, error) {
	c := &caseExpr{}
	if !p.peek().isKeyword("when") {
		x, err := p.expr()
		if err != nil {
			return nil, err
		}
		c.arg = x
	}
	for p.accept("when") {
		cond, err := p.expr()
		if err != nil {
			return nil, err
		}
		if err := p.expect("then"); err != nil {
			return nil, err
		}
		res, err := p.expr()
		if err != nil {
			return nil, err
		}
		c.whens = append(c.whens, caseWhen{cond: cond, result: res})
	}
	if len(c.whens) == 0 {
		return nil, p.errExpected("WHEN")
	}
	if p.accept("else") {
		x, err := p.expr()
		if err != nil {
			return nil, err
		}
		c.els = x
	}
	return c, p.expect("end")
}

// numberConst types a numeric literal as Postgres does: an integer that
// fits int4 is integer, one that fits int8 is bigint, anything else
// (including any literal with a point or exponent) is numeric.
func numberConst(text string, pos int) (expr, error) {
	if !strings.ContainsAny(text, ".eE") {
		if n, err := strconv.ParseInt(text, 10, 64); err == nil {
			if n >= math.MinInt32 && n <= math.MaxInt32 {
				return &constExpr{v: int4Val(n), pos: pos}, nil
			}
			return &constExpr{v: int8Val(n), pos: pos}, nil
		}
	}
	v, err := parseNumeric(text)
	if err != nil {
		return nil, err
	}
	return &constExpr{v: v, pos: pos}, nil
}

// parseNumeric reads a decimal number exactly. Its display scale is the
// number of digits after the point, less the exponent (as numeric_in).
func parseNumeric(text string) (value, error) {
	s := strings.TrimSpace(text)
	if !isDecimal(s) {
		return value{}, errorf(codeInvalidText, "invalid input syntax for type numeric: %q", text).
			withHint("write a decimal number such as 0.95")
	}
	r, ok := new(big.Rat).SetString(s)
	if !ok {
		return value{}, errorf(codeInvalidText, "invalid input syntax for type numeric: %q", text)
	}
	mant, exp := s, 0
	if k := strings.IndexAny(s, "eE"); k >= 0 {
		mant = s[:k]
		e, err := strconv.Atoi(s[k+1:])
		if err != nil || e > 1000 || e < -1000 {
			return value{}, errorf(codeOutOfRange, "value %q is out of range for type numeric", text)
		}
		exp = e
	}
	scale := 0
	if k := strings.IndexByte(mant, '.'); k >= 0 {
		scale = len(mant) - k - 1
	}
	scale -= exp
	if scale < 0 {
		scale = 0
	}
	return numericVal(r, scale), nil
}

// isDecimal reports whether s is [+-]digits[.digits][e[+-]digits] with at
// least one digit in the mantissa: the syntax numeric_in and float8in share
// for finite values.
func isDecimal(s string) bool {
	i := 0
	if i < len(s) && (s[i] == '+' || s[i] == '-') {
		i++
	}
	digits := 0
	for i < len(s) && s[i] >= '0' && s[i] <= '9' {
		i++
		digits++
	}
	if i < len(s) && s[i] == '.' {
		i++
		for i < len(s) && s[i] >= '0' && s[i] <= '9' {
			i++
			digits++
		}
	}
	if digits == 0 {
		return false
	}
	if i < len(s) && (s[i] == 'e' || s[i] == 'E') {
		i++
		if i < len(s) && (s[i] == '+' || s[i] == '-') {
			i++
		}
		start := i
		for i < len(s) && s[i] >= '0' && s[i] <= '9' {
			i++
		}
		if i == start {
			return false
		}
	}
	return i == len(s)
}
