package sqlwire

import (
	"fmt"
	"strings"
	"time"
)

// paramVal is one bound parameter: its declared type (tUnknown when the
// client gave none) and its text, or NULL. known is false while only the
// types are known (Describe before Bind).
type paramVal struct {
	t     typ
	text  string
	null  bool
	known bool
}

// relInfo is one relation of FROM: the table and the name columns may be
// qualified with.
type relInfo struct {
	alias string
	table *tableDef
}

// compiler turns parsed expressions into nodes for one SELECT.
type compiler struct {
	rels   []relInfo
	params []paramVal
	loc    *time.Location
	lim    *Limits // nil: no bound on IN lists

	// Grouped queries: the GROUP BY expressions (canonical text and
	// compiled node) and the aggregates found so far.
	grouped    bool
	groupTexts []string
	groupNodes []node
	aggs       []*aggSpec

	inAgg  bool   // compiling an aggregate's argument
	clause string // "WHERE", "JOIN/ON", "GROUP BY", ...: where aggregates are refused
}

// resolve binds a column reference to its relation and column.
func (c *compiler) resolve(r *colRef) (*colBinding, error) {
	if r.ref != nil {
		return r.ref, nil
	}
	found := -1
	col := -1
	for i, rel := range c.rels {
		if r.rel != "" && r.rel != rel.alias && r.rel != rel.table.name {
			continue
		}
		if j := rel.table.column(r.name); j >= 0 {
			if found >= 0 {
				return nil, errorf("42702", "column reference %q is ambiguous", r.name).withHint("qualify it with the table alias")
			}
			found, col = i, j
		}
	}
	if found < 0 {
		if r.rel != "" {
			known := false
			for _, rel := range c.rels {
				if r.rel == rel.alias || r.rel == rel.table.name {
					known = true
				}
			}
			if !known {
				return nil, errorf("42P01", "missing FROM-clause entry for table %q", r.rel)
			}
		}
		if len(c.rels) == 0 {
			return nil, errorf(codeUndefinedColumn, "column %q does not exist", r.name).
				withHint("select from sidetrend_live.forecast, backtest or series")
		}
		var names []string
		for _, rel := range c.rels {
			names = append(names, "sidetrend_live."+rel.table.name+" has "+rel.table.columnList())
		}
		return nil, errorf(codeUndefinedColumn, "column %q does not exist", r.name).
			withHint("%s; recreate the foreign table from sql/foreign.sql if its columns differ", strings.Join(names, "; "))
	}
	r.ref = &colBinding{rel: found, col: col, t: c.rels[found].table.cols[col].t}
	return r.ref, nil
}

// canonical is the text of x with its column references resolved, so that
// tracker and r1.tracker match when they name the same column.
func (c *compiler) canonical(x expr) string {
	var b strings.Builder
	c.writeCanonical(&b, x)
	return b.String()
}

func (c *compiler) writeCanonical(b *strings.Builder, x expr) {
	switch x := x.(type) {
	case *colRef:
		if ref, err := c.resolve(x); err == nil {
			fmt.Fprintf(b, "#%d.%d", ref.rel, ref.col)
			return
		}
		b.WriteString(x.String())
	case *opExpr:
		b.WriteString("(")
		if x.l != nil {
			c.writeCanonical(b, x.l)
		}
		b.WriteString(" " + x.op + " ")
		c.writeCanonical(b, x.r)
		b.WriteString(")")
	case *castExpr:
		c.writeCanonical(b, x.x)
		b.WriteString("::" + x.t.String())
		if x.array {
			b.WriteString("[]")
		}
	case *funcCall:
		b.WriteString(x.name + "(")
		if x.distinct {
			b.WriteString("DISTINCT ")
		}
		if x.star {
			b.WriteString("*")
		}
		for i, a := range x.args {
			if i > 0 {
				b.WriteString(", ")
			}
			c.writeCanonical(b, a)
		}
		b.WriteString(")")
		if x.filter != nil {
			b.WriteString(" FILTER (")
			c.writeCanonical(b, x.filter)
			b.WriteString(")")
		}
	default:
		b.WriteString(x.String())
	}
}

// compile compiles x in the current context.
func (c *compiler) compile(x expr) (node, error) {
	if c.grouped && !c.inAgg {
		if len(c.groupTexts) > 0 {
			t := c.canonical(x)
			for i, g := range c.groupTexts {
				if g == t {
					return &groupKeyNode{idx: i, t: c.groupNodes[i].typ()}, nil
				}
			}
		}
	}
	switch x := x.(type) {
	case *colRef:
		ref, err := c.resolve(x)
		if err != nil {
			return nil, err
		}
		if c.grouped && !c.inAgg {
			return nil, errorf(codeGrouping, "column %s must appear in the GROUP BY clause or be used in an aggregate function", x.String())
		}
		return &colNode{rel: ref.rel, col: ref.col, t: ref.t}, nil
	case *constExpr:
		return constOf(x.v), nil
	case *paramExpr:
		if x.n > len(c.params) {
			return nil, errorf(codeProtocolViolation, "there is no parameter $%d", x.n).
				withHint("bind a value for every $n the statement uses")
		}
		p := c.params[x.n-1]
		if !p.known {
			return &paramTypeNode{t: p.t}, nil
		}
		if p.null {
			if p.t == tUnknown {
				return constOf(nullOf(tNull)), nil
			}
			return constOf(nullOf(p.t)), nil
		}
		if p.t == tUnknown {
			return constOf(value{t: tUnknown, s: p.text}), nil
		}
		v, err := inputValue(p.text, p.t, c.loc)
		if err != nil {
			return nil, err
		}
		return constOf(v), nil
	case *castExpr:
		in, err := c.compile(x.x)
		if err != nil {
			return nil, err
		}
		return fold(&castNode{x: in, to: x.t, array: x.array, prec: x.prec, scale: x.scale, loc: c.loc})
	case *opExpr:
		return c.compileOp(x)
	case *boolExpr:
		args := make([]node, len(x.args))
		for i, a := range x.args {
			n, err := c.compileBool(a, strings.ToUpper(x.op))
			if err != nil {
				return nil, err
			}
			args[i] = n
		}
		switch x.op {
		case "and":
			return &andNode{args: flatten("and", args)}, nil
		case "or":
			return &orNode{args: flatten("or", args)}, nil
		}
		return &notNode{x: args[0]}, nil
	case *nullTest:
		in, err := c.compile(x.x)
		if err != nil {
			return nil, err
		}
		return &nullTestNode{x: in, not: x.not}, nil
	case *boolTest:
		in, err := c.compileBool(x.x, "IS "+strings.ToUpper(x.what))
		if err != nil {
			return nil, err
		}
		return &boolTestNode{x: in, what: x.what, not: x.not}, nil
	case *distinctExpr:
		l, r, kind, err := c.comparable(x.l, x.r, "IS DISTINCT FROM")
		if err != nil {
			return nil, err
		}
		return &distinctNode{l: l, r: r, kind: kind, not: x.not}, nil
	case *arrayOpExpr:
		return c.compileArrayOp(x)
	case *arrayExpr:
		return c.compileArray(x, tUnknown)
	case *caseExpr:
		return c.compileCase(x)
	case *funcCall:
		return c.compileCall(x)
	}
	return nil, notSupported("expression %s is not supported", x.String())
}

// paramTypeNode stands for a parameter whose value is not bound yet; it is
// only compiled to learn result types (Describe of a prepared statement).
type paramTypeNode struct{ t typ }

func (n *paramTypeNode) typ() typ { return n.t }
func (n *paramTypeNode) eval(*env) (value, error) {
	return value{}, errorf(codeProtocolViolation, "parameter value is not bound yet")
}

// flatten merges nested ANDs (or ORs) into one list, as Postgres does.
func flatten(op string, args []node) []node {
	var out []node
	for _, a := range args {
		switch a := a.(type) {
		case *andNode:
			if op == "and" {
				out = append(out, a.args...)
				continue
			}
		case *orNode:
			if op == "or" {
				out = append(out, a.args...)
				continue
			}
		}
		out = append(out, a)
	}
	return out
}

// compileBool compiles a condition, which must be boolean.
func (c *compiler) compileBool(x expr, what string) (node, error) {
	n, err := c.compile(x)
	if err != nil {
		return nil, err
	}
	return c.asBool(n, what)
}

func (c *compiler) asBool(n node, what string) (node, error) {
	switch n.typ() {
	case tBool:
		return n, nil
	case tNull:
		return constOf(nullOf(tBool)), nil
	case tUnknown:
		if v, ok := isConstNode(n); ok {
			b, err := inputValue(v.s, tBool, c.loc)
			if err != nil {
				return nil, err
			}
			return constOf(b), nil
		}
		return &castNode{x: n, to: tBool, prec: -1, scale: -1, loc: c.loc}, nil
	}
	return nil, errorf(codeDatatypeMismatch, "argument of %s must be type boolean, not type %s", what, n.typ())
}

// fold evaluates a node whose inputs are all constants, so that errors in
// literals show before any row is computed and conditions on parameter
// columns see plain values.
func fold(n node) (node, error) {
	if !allConst(n) {
		return n, nil
	}
	v, err := n.eval(&env{})
	if err != nil {
		return nil, err
	}
	return constOf(v), nil
}

func allConst(n node) bool {
	isC := func(x node) bool {
		if x == nil {
			return true
		}
		_, ok := x.(*constNode)
		return ok
	}
	switch n := n.(type) {
	case *castNode:
		return isC(n.x)
	case *arithNode:
		return isC(n.l) && isC(n.r)
	case *arrayNode:
		for _, e := range n.elems {
			if !isC(e) {
				return false
			}
		}
		return true
	case *cmpNode:
		return isC(n.l) && isC(n.r)
	}
	return false
}

// coerceUnknown gives an untyped literal or parameter the type t.
func (c *compiler) coerceUnknown(n node, t typ) (node, error) {
	if n.typ() != tUnknown || t == tUnknown || t == tNull {
		return n, nil
	}
	if v, ok := isConstNode(n); ok {
		r, err := inputValue(v.s, t, c.loc)
		if err != nil {
			return nil, err
		}
		return constOf(r), nil
	}
	return &castNode{x: n, to: t, prec: -1, scale: -1, loc: c.loc}, nil
}

// comparable compiles two operands of a comparison, resolving untyped ones
// from the other side, and picks the comparison domain.
func (c *compiler) comparable(lx, rx expr, op string) (node, node, cmpKind, error) {
	l, err := c.compile(lx)
	if err != nil {
		return nil, nil, 0, err
	}
	r, err := c.compile(rx)
	if err != nil {
		return nil, nil, 0, err
	}
	l, r, kind, err := c.unify(l, r, op)
	return l, r, kind, err
}

func (c *compiler) unify(l, r node, op string) (node, node, cmpKind, error) {
	lt, rt := l.typ(), r.typ()
	var err error
	switch {
	case lt == tUnknown && rt == tUnknown:
		if l, err = c.coerceUnknown(l, tText); err != nil {
			return nil, nil, 0, err
		}
		if r, err = c.coerceUnknown(r, tText); err != nil {
			return nil, nil, 0, err
		}
	case lt == tUnknown:
		if l, err = c.coerceUnknown(l, rt); err != nil {
			return nil, nil, 0, err
		}
	case rt == tUnknown:
		if r, err = c.coerceUnknown(r, lt); err != nil {
			return nil, nil, 0, err
		}
	}
	kind, ok := compareKind(l.typ(), r.typ())
	if !ok {
		return nil, nil, 0, errorf(codeUndefinedFunction, "operator does not exist: %s %s %s", l.typ(), op, r.typ()).
			withHint("compare values of the same type, or cast one side explicitly")
	}
	return l, r, kind, nil
}

func (c *compiler) compileOp(x *opExpr) (node, error) {
	switch x.op {
	case "=", "<>", "<", "<=", ">", ">=":
		l, r, kind, err := c.comparable(x.l, x.r, x.op)
		if err != nil {
			return nil, err
		}
		return fold(&cmpNode{op: x.op, l: l, r: r, kind: kind})
	case "~~", "!~~":
		l, err := c.compile(x.l)
		if err != nil {
			return nil, err
		}
		r, err := c.compile(x.r)
		if err != nil {
			return nil, err
		}
		if l, err = c.coerceUnknown(l, tText); err != nil {
			return nil, err
		}
		if r, err = c.coerceUnknown(r, tText); err != nil {
			return nil, err
		}
		if l.typ() != tText || r.typ() != tText {
			return nil, errorf(codeUndefinedFunction, "operator does not exist: %s ~~ %s", l.typ(), r.typ()).
				withHint("LIKE compares text")
		}
		return &likeNode{l: l, r: r, not: x.op == "!~~"}, nil
	case "+", "-", "*", "/", "%":
		var l node
		if x.l != nil {
			n, err := c.compile(x.l)
			if err != nil {
				return nil, err
			}
			l = n
		}
		r, err := c.compile(x.r)
		if err != nil {
			return nil, err
		}
		if l == nil {
			if r.typ() == tUnknown {
				if r, err = c.coerceUnknown(r, tNumeric); err != nil {
					return nil, err
				}
			}
			if !r.typ().isNum() {
				return nil, errorf(codeUndefinedFunction, "operator does not exist: - %s", r.typ())
			}
			return fold(&arithNode{op: "-", r: r, t: r.typ()})
		}
		switch {
		case l.typ() == tUnknown && r.typ() == tUnknown:
			return nil, errorf("42725", "operator is not unique: unknown %s unknown", x.op).
				withHint("cast one operand, for example 1::integer")
		case l.typ() == tUnknown:
			if l, err = c.coerceUnknown(l, r.typ()); err != nil {
				return nil, err
			}
		case r.typ() == tUnknown:
			if r, err = c.coerceUnknown(r, l.typ()); err != nil {
				return nil, err
			}
		}
		t, ok := arithType(l.typ(), r.typ())
		if dt, isDate := dateArithType(x.op, l.typ(), r.typ()); isDate {
			t, ok = dt, dt != 0
		}
		if !ok || x.op == "%" && !t.isInt() {
			return nil, errorf(codeUndefinedFunction, "operator does not exist: %s %s %s", l.typ(), x.op, r.typ())
		}
		if l.typ() == tNull || r.typ() == tNull {
			return constOf(nullOf(t)), nil
		}
		return fold(&arithNode{op: x.op, l: l, r: r, t: t})
	}
	return nil, notSupported("operator %s is not supported", x.op)
}

// dateArithType is the result type of date arithmetic (date - date is
// integer, date + integer and date - integer are date); isDate is false
// when neither operand is a date, and t is 0 for an operator that does not
// exist.
func dateArithType(op string, a, b typ) (t typ, isDate bool) {
	if a != tDate && b != tDate {
		return 0, false
	}
	switch {
	case op == "-" && a == tDate && b == tDate:
		return tInt4, true
	case (op == "+" || op == "-") && a == tDate && (b == tInt4 || b == tInt2):
		return tDate, true
	case op == "+" && b == tDate && (a == tInt4 || a == tInt2):
		return tDate, true
	}
	return 0, true
}

// arithType is the result type of arithmetic on a and b: the wider integer,
// numeric with integers, float8 with any float (float4 only with float4).
func arithType(a, b typ) (typ, bool) {
	if a == tNull {
		a = b
	}
	if b == tNull {
		b = a
	}
	switch {
	case a.isInt() && b.isInt():
		return max(a, b), true
	case a == tFloat4 && b == tFloat4:
		return tFloat4, true
	case a.isNum() && b.isNum() && (a.isFloat() || b.isFloat()):
		return tFloat8, true
	case a.isNum() && b.isNum():
		return tNumeric, true
	}
	return 0, false
}

func (c *compiler) compileArrayOp(x *arrayOpExpr) (node, error) {
	l, err := c.compile(x.l)
	if err != nil {
		return nil, err
	}
	var r node
	if arr, ok := x.r.(*arrayExpr); ok {
		if err := c.lim.checkInList(len(arr.elems)); err != nil {
			return nil, err
		}
		hint := l.typ()
		r, err = c.compileArray(arr, hint)
	} else {
		r, err = c.compile(x.r)
	}
	if err != nil {
		return nil, err
	}
	if !isArrayNode(r) {
		if r.typ() == tUnknown || r.typ() == tNull {
			// x = ANY ('{1,2}'): the literal is an array of x's type.
			et := l.typ()
			if et == tUnknown {
				et = tText
			}
			r, err = fold(&castNode{x: r, to: et, array: true, prec: -1, scale: -1, loc: c.loc})
			if err != nil {
				return nil, err
			}
		} else {
			q := "ALL"
			if x.any {
				q = "ANY"
			}
			return nil, errorf(codeDatatypeMismatch, "op %s/%s (array) requires array on right side", q, x.op)
		}
	}
	if l, err = c.coerceUnknown(l, r.typ()); err != nil {
		return nil, err
	}
	if v, ok := isConstNode(r); ok {
		// An array literal or parameter: '{...}'::float8[], $1.
		if err := c.lim.checkInList(len(v.arr)); err != nil {
			return nil, err
		}
	}
	kind, ok := compareKind(l.typ(), r.typ())
	if !ok {
		return nil, errorf(codeUndefinedFunction, "operator does not exist: %s %s %s[]", l.typ(), x.op, r.typ()).
			withHint("compare with an array of the column's type")
	}
	n := &anyNode{op: x.op, any: x.any, l: l, r: r, kind: kind}
	n.index()
	return n, nil
}

// isArrayNode reports whether n yields an array.
func isArrayNode(n node) bool {
	switch n := n.(type) {
	case *arrayNode:
		return true
	case *castNode:
		return n.array
	case *constNode:
		return n.v.array
	}
	return false
}

// compileArray compiles ARRAY[...]; elements of unknown type take the type
// of the others, or hint (the type of what the array is compared with).
func (c *compiler) compileArray(x *arrayExpr, hint typ) (node, error) {
	elems := make([]node, len(x.elems))
	t := tUnknown
	for i, e := range x.elems {
		n, err := c.compile(e)
		if err != nil {
			return nil, err
		}
		if isArrayNode(n) {
			return nil, notSupported("multidimensional arrays are not supported")
		}
		elems[i] = n
		switch et := n.typ(); {
		case et == tUnknown || et == tNull:
		case t == tUnknown:
			t = et
		case t != et:
			if nt, ok := arithType(t, et); ok {
				t = nt
			} else {
				return nil, errorf(codeDatatypeMismatch, "ARRAY types %s and %s cannot be matched", t, et)
			}
		}
	}
	if t == tUnknown {
		t = hint
		if t == tUnknown || t == tNull {
			t = tText
		}
	}
	for i, n := range elems {
		var err error
		if n.typ() == tUnknown {
			if elems[i], err = c.coerceUnknown(n, t); err != nil {
				return nil, err
			}
		} else if n.typ() != t && n.typ() != tNull {
			if elems[i], err = fold(&castNode{x: n, to: t, prec: -1, scale: -1, loc: c.loc}); err != nil {
				return nil, err
			}
		}
	}
	return fold(&arrayNode{elems: elems, t: t})
}

func (c *compiler) compileCase(x *caseExpr) (node, error) {
	n := &caseNode{}
	if x.arg != nil {
		a, err := c.compile(x.arg)
		if err != nil {
			return nil, err
		}
		n.arg = a
	}
	var results []node
	for _, w := range x.whens {
		var cond node
		var err error
		if n.arg != nil {
			var arg node
			arg, cond, n.kind, err = c.unify(n.arg, mustCompile(c, w.cond, &err), "=")
			if err != nil {
				return nil, err
			}
			n.arg = arg
		} else if cond, err = c.compileBool(w.cond, "CASE/WHEN"); err != nil {
			return nil, err
		}
		res, err := c.compile(w.result)
		if err != nil {
			return nil, err
		}
		n.whens = append(n.whens, cond)
		results = append(results, res)
	}
	if x.els != nil {
		e, err := c.compile(x.els)
		if err != nil {
			return nil, err
		}
		results = append(results, e)
	}
	t := tUnknown
	for _, r := range results {
		switch rt := r.typ(); {
		case rt == tUnknown || rt == tNull:
		case t == tUnknown:
			t = rt
		case t != rt:
			nt, ok := arithType(t, rt)
			if !ok {
				return nil, errorf(codeDatatypeMismatch, "CASE types %s and %s cannot be matched", t, rt)
			}
			t = nt
		}
	}
	if t == tUnknown {
		t = tText
	}
	for i, r := range results {
		var err error
		if r.typ() == tUnknown {
			r, err = c.coerceUnknown(r, t)
		} else if r.typ() != t && r.typ() != tNull {
			r, err = fold(&castNode{x: r, to: t, prec: -1, scale: -1, loc: c.loc})
		}
		if err != nil {
			return nil, err
		}
		results[i] = r
	}
	n.thens = results[:len(x.whens)]
	if x.els != nil {
		n.els = results[len(x.whens)]
	}
	n.t = t
	return n, nil
}

func mustCompile(c *compiler, x expr, errp *error) node {
	n, err := c.compile(x)
	if err != nil {
		*errp = err
		return constOf(nullOf(tNull))
	}
	return n
}

// aggregateNames are the aggregates the endpoint computes when
// postgres_fdw pushes a grouped query down.
var aggregateNames = map[string]bool{"count": true, "sum": true, "avg": true, "min": true, "max": true}

func (c *compiler) compileCall(x *funcCall) (node, error) {
	if !aggregateNames[x.name] {
		switch x.name {
		case "pg_relation_size", "pg_total_relation_size", "pg_table_size":
			return nil, notSupported("ANALYZE of sidetrend_live tables is not supported: their rows are computed on demand, so there is nothing to sample")
		}
		return nil, notSupported("function %s() is not supported remotely", x.name).
			withHint("the endpoint computes count, sum, avg, min and max; other functions must run on the local side")
	}
	if c.clause != "" {
		return nil, errorf(codeGrouping, "aggregate functions are not allowed in %s", c.clause)
	}
	if c.inAgg {
		return nil, errorf(codeGrouping, "aggregate function calls cannot be nested")
	}
	if !c.grouped {
		return nil, errorf(codeInternal, "aggregate %s outside a grouped query", x.name)
	}
	spec := &aggSpec{fn: x.name, star: x.star, distinct: x.distinct}
	c.inAgg = true
	defer func() { c.inAgg = false }()
	switch {
	case x.star:
		if x.name != "count" {
			return nil, errorf(codeSyntax, "%s(*) is not valid: only count(*) takes *", x.name)
		}
		spec.t = tInt8
	case len(x.args) != 1:
		return nil, errorf(codeUndefinedFunction, "function %s with %d arguments does not exist", x.name, len(x.args))
	default:
		arg, err := c.compile(x.args[0])
		if err != nil {
			return nil, err
		}
		if arg.typ() == tUnknown {
			if x.name == "count" || x.name == "min" || x.name == "max" {
				arg, err = c.coerceUnknown(arg, tText)
			} else {
				err = errorf(codeUndefinedFunction, "function %s(unknown) is not unique", x.name).withHint("cast the argument")
			}
			if err != nil {
				return nil, err
			}
		}
		spec.arg = arg
		t, ok := aggResultType(x.name, arg.typ())
		if !ok {
			return nil, errorf(codeUndefinedFunction, "function %s(%s) does not exist", x.name, arg.typ())
		}
		spec.t = t
	}
	if x.filter != nil {
		f, err := c.compileBool(x.filter, "FILTER")
		if err != nil {
			return nil, err
		}
		spec.filter = f
	}
	c.aggs = append(c.aggs, spec)
	return &aggRefNode{idx: len(c.aggs) - 1, t: spec.t}, nil
}

// aggResultType is Postgres' result type of aggregate fn over type t.
func aggResultType(fn string, t typ) (typ, bool) {
	switch fn {
	case "count":
		return tInt8, true
	case "sum":
		switch t {
		case tInt2, tInt4:
			return tInt8, true
		case tInt8, tNumeric:
			return tNumeric, true
		case tFloat4, tFloat8:
			return t, true
		}
	case "avg":
		switch {
		case t.isInt() || t == tNumeric:
			return tNumeric, true
		case t.isFloat():
			return tFloat8, true
		}
	case "min", "max":
		if t.isNum() || t == tText || t == tTimestamptz {
			return t, true
		}
	}
	return 0, false
}

// containsAggregate reports whether x calls an aggregate (outside nested
// subqueries, which the subset does not have).
func containsAggregate(x expr) bool {
	found := false
	walkExpr(x, func(e expr) {
		if f, ok := e.(*funcCall); ok && aggregateNames[f.name] {
			found = true
		}
	})
	return found
}

// walkExpr calls fn on x and every expression below it.
func walkExpr(x expr, fn func(expr)) {
	if x == nil {
		return
	}
	fn(x)
	switch x := x.(type) {
	case *castExpr:
		walkExpr(x.x, fn)
	case *opExpr:
		walkExpr(x.l, fn)
		walkExpr(x.r, fn)
	case *boolExpr:
		for _, a := range x.args {
			walkExpr(a, fn)
		}
	case *nullTest:
		walkExpr(x.x, fn)
	case *boolTest:
		walkExpr(x.x, fn)
	case *distinctExpr:
		walkExpr(x.l, fn)
		walkExpr(x.r, fn)
	case *arrayOpExpr:
		walkExpr(x.l, fn)
		walkExpr(x.r, fn)
	case *arrayExpr:
		for _, e := range x.elems {
			walkExpr(e, fn)
		}
	case *caseExpr:
		walkExpr(x.arg, fn)
		for _, w := range x.whens {
			walkExpr(w.cond, fn)
			walkExpr(w.result, fn)
		}
		walkExpr(x.els, fn)
	case *funcCall:
		for _, a := range x.args {
			walkExpr(a, fn)
		}
		walkExpr(x.filter, fn)
	}
}
