package sqlwire

import (
	"strconv"
	"strings"
)

// expr is a node of a parsed expression. String gives a canonical text,
// used to match GROUP BY expressions and to name conditions in errors.
type expr interface {
	String() string
}

// colRef is a column reference, rel.name or name. bind fills in where the
// column comes from.
type colRef struct {
	rel, name string
	pos       int
	ref       *colBinding
}

// colBinding is a resolved column: relation index in the FROM list and
// column index in that relation.
type colBinding struct {
	rel, col int
	t        typ
}

type constExpr struct {
	v   value
	pos int
}

type paramExpr struct {
	n   int
	pos int
}

type castExpr struct {
	x     expr
	t     typ
	array bool
	scale int // numeric(p,s) typmod scale, -1 if none
	prec  int // numeric(p,s) typmod precision, -1 if none
	pos   int
}

// opExpr is a binary operator, or a unary one when l is nil.
type opExpr struct {
	op   string
	l, r expr
	pos  int
}

// boolExpr is AND, OR (any number of args) or NOT (one arg).
type boolExpr struct {
	op   string
	args []expr
}

type nullTest struct {
	x   expr
	not bool
}

// boolTest is x IS [NOT] TRUE / FALSE / UNKNOWN.
type boolTest struct {
	x    expr
	what string // "true", "false", "unknown"
	not  bool
}

// distinctExpr is l IS [NOT] DISTINCT FROM r.
type distinctExpr struct {
	l, r expr
	not  bool
}

// arrayOpExpr is l op ANY (r) or l op ALL (r).
type arrayOpExpr struct {
	op  string
	any bool
	l   expr
	r   expr
	pos int
}

type arrayExpr struct {
	elems []expr
	pos   int
}

type caseWhen struct{ cond, result expr }

type caseExpr struct {
	arg   expr // CASE arg WHEN ...; nil for CASE WHEN cond
	whens []caseWhen
	els   expr
}

// funcCall is a function or aggregate call. The pg_catalog schema is
// dropped from name; any other schema makes the call unsupported.
type funcCall struct {
	name     string
	args     []expr
	star     bool
	distinct bool
	filter   expr
	order    bool // an ORDER BY inside the call
	pos      int
}

func (c *colRef) String() string {
	if c.rel != "" {
		return quoteIdent(c.rel) + "." + quoteIdent(c.name)
	}
	return quoteIdent(c.name)
}

func (c *constExpr) String() string {
	if c.v.null {
		return "NULL"
	}
	s := string(appendText(nil, c.v, 1))
	switch c.v.t {
	case tUnknown, tText:
		return quoteLiteral(s)
	case tBool:
		if c.v.i != 0 {
			return "true"
		}
		return "false"
	}
	return s
}

func (p *paramExpr) String() string { return "$" + strconv.Itoa(p.n) }

func (c *castExpr) String() string {
	t := c.t.String()
	if c.prec >= 0 {
		t += "(" + strconv.Itoa(c.prec) + "," + strconv.Itoa(c.scale) + ")"
	}
	if c.array {
		t += "[]"
	}
	return c.x.String() + "::" + t
}

func (o *opExpr) String() string {
	if o.l == nil {
		return "(" + o.op + " " + o.r.String() + ")"
	}
	return "(" + o.l.String() + " " + o.op + " " + o.r.String() + ")"
}

func (b *boolExpr) String() string {
	if b.op == "not" {
		return "(NOT " + b.args[0].String() + ")"
	}
	parts := make([]string, len(b.args))
	for i, a := range b.args {
		parts[i] = a.String()
	}
	return "(" + strings.Join(parts, " "+strings.ToUpper(b.op)+" ") + ")"
}

func (n *nullTest) String() string {
	if n.not {
		return "(" + n.x.String() + " IS NOT NULL)"
	}
	return "(" + n.x.String() + " IS NULL)"
}

func (b *boolTest) String() string {
	not := ""
	if b.not {
		not = "NOT "
	}
	return "(" + b.x.String() + " IS " + not + strings.ToUpper(b.what) + ")"
}

func (d *distinctExpr) String() string {
	if d.not {
		return "(" + d.l.String() + " IS NOT DISTINCT FROM " + d.r.String() + ")"
	}
	return "(" + d.l.String() + " IS DISTINCT FROM " + d.r.String() + ")"
}

func (a *arrayOpExpr) String() string {
	q := "ALL"
	if a.any {
		q = "ANY"
	}
	return "(" + a.l.String() + " " + a.op + " " + q + " (" + a.r.String() + "))"
}

func (a *arrayExpr) String() string {
	parts := make([]string, len(a.elems))
	for i, e := range a.elems {
		parts[i] = e.String()
	}
	return "ARRAY[" + strings.Join(parts, ", ") + "]"
}

func (c *caseExpr) String() string {
	var b strings.Builder
	b.WriteString("(CASE")
	if c.arg != nil {
		b.WriteString(" " + c.arg.String())
	}
	for _, w := range c.whens {
		b.WriteString(" WHEN " + w.cond.String() + " THEN " + w.result.String())
	}
	if c.els != nil {
		b.WriteString(" ELSE " + c.els.String())
	}
	b.WriteString(" END)")
	return b.String()
}

func (f *funcCall) String() string {
	var b strings.Builder
	b.WriteString(f.name + "(")
	if f.distinct {
		b.WriteString("DISTINCT ")
	}
	if f.star {
		b.WriteString("*")
	}
	for i, a := range f.args {
		if i > 0 {
			b.WriteString(", ")
		}
		b.WriteString(a.String())
	}
	b.WriteString(")")
	if f.filter != nil {
		b.WriteString(" FILTER (WHERE " + f.filter.String() + ")")
	}
	return b.String()
}

func quoteIdent(s string) string {
	plain := s != ""
	for i := 0; i < len(s); i++ {
		c := s[i]
		if !(c >= 'a' && c <= 'z' || c == '_' || i > 0 && c >= '0' && c <= '9') {
			plain = false
			break
		}
	}
	if plain && !reserved[s] {
		return s
	}
	return `"` + strings.ReplaceAll(s, `"`, `""`) + `"`
}

func quoteLiteral(s string) string { return "'" + strings.ReplaceAll(s, "'", "''") + "'" }

// reserved words that must be quoted as identifiers (the ones that matter
// for the columns and names the endpoint prints).
var reserved = map[string]bool{
	"all": true, "and": true, "any": true, "array": true, "as": true, "asc": true,
	"case": true, "cast": true, "desc": true, "distinct": true, "else": true,
	"end": true, "false": true, "for": true, "from": true, "group": true,
	"having": true, "in": true, "limit": true, "not": true, "null": true,
	"offset": true, "on": true, "or": true, "order": true, "select": true,
	"then": true, "true": true, "when": true, "where": true, "with": true,
}

// Statements.

type stmt interface{ tag() string }

// selectStmt is the SELECT subset: one FROM item (a table, or a join of
// tables), conditions, grouping, order and limits.
type selectStmt struct {
	targets []target
	from    []*tableRef // the relations in FROM, in order; empty for SELECT without FROM
	join    *joinSpec   // set when from has two relations
	where   expr
	groupBy []expr
	having  expr
	orderBy []sortItem
	limit   expr
	offset  expr
	text    string // the statement text, for messages
}

type target struct {
	x     expr
	alias string
	star  string // "*" for SELECT *, "rel" for rel.*; x is nil then
}

type tableRef struct {
	schema, name, alias string
	pos                 int
}

type joinSpec struct {
	kind string // inner, left, right, full
	on   expr
}

type sortItem struct {
	x          expr
	desc       bool
	nullsFirst bool
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
	kind     txKind
	verb     string // "start" for START TRANSACTION, whose tag differs from BEGIN
	name     string // savepoint name
	readOnly bool   // READ ONLY given (informational)
}

type setStmt struct {
	name  string
	value string // "" with reset or DEFAULT
	reset bool   // RESET name or SET name TO DEFAULT
	all   bool   // RESET ALL
	local bool   // SET LOCAL
	tx    bool   // SET TRANSACTION ... (accepted, nothing to change)
	// resetCmd marks RESET (tag RESET) as opposed to SET ... TO DEFAULT.
	resetCmd bool
}

type showStmt struct{ name string }

type deallocateStmt struct {
	name string
	all  bool
}

type discardStmt struct{}

// emptyStmt is a query string with no statement in it.
type emptyStmt struct{}

func (*selectStmt) tag() string  { return "SELECT" }
func (*declareStmt) tag() string { return "DECLARE CURSOR" }
func (f *fetchStmt) tag() string { return map[bool]string{false: "FETCH", true: "MOVE"}[f.move] }
func (*closeStmt) tag() string   { return "CLOSE CURSOR" }
func (*setStmt) tag() string     { return "SET" }
func (*showStmt) tag() string    { return "SHOW" }
func (*discardStmt) tag() string { return "DISCARD ALL" }
func (*emptyStmt) tag() string   { return "" }
func (d *deallocateStmt) tag() string {
	if d.all {
		return "DEALLOCATE ALL"
	}
	return "DEALLOCATE"
}
func (t *txStmt) tag() string {
	switch t.kind {
	case txBegin:
		return "BEGIN"
	case txCommit:
		return "COMMIT"
	case txRollback, txRollbackTo:
		return "ROLLBACK"
	case txSavepoint:
		return "SAVEPOINT"
	case txRelease:
		return "RELEASE"
	}
	return ""
}
