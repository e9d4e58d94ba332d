package sqlwire

import (
	"context"
	"math"
	"math/big"
	"sort"
	"strconv"

	"github.com/jackc/pgx/v5/pgtype"
	pg "github.com/pganalyze/pg_query_go/v6"
	"google.golang.org/protobuf/proto"
)

// From the conditions of a SELECT, the endpoint works out what each table
// must compute: for each parameter column (tracker, series_key, lambda,
// horizon) a superset of the values a row can have and still satisfy
// them. It computes exactly those rows; the sidecar's Postgres then runs
// the whole query over them, so the conditions only have to narrow, never
// to decide. The constants of the conditions (literals, casts, $n, arrays)
// are evaluated by that Postgres too, in one query, so that a bound means
// what Postgres means by it.

// domain is what the conditions let one parameter column be: everything,
// a finite set (strings or exact numbers), or an interval of numbers with
// ends open, closed or absent.
type domain struct {
	all      bool
	interval bool
	strs     []string   // finite set of a text column, sorted
	nums     []*big.Rat // finite set of a numeric column, sorted
	lo, hi   *big.Rat
	loInc    bool
	hiInc    bool
}

var domainAll = domain{all: true}

func (d domain) empty() bool { return !d.all && !d.interval && len(d.strs) == 0 && len(d.nums) == 0 }

// bound is one constant side of a condition, evaluated by Postgres.
type bound struct {
	null    bool
	str     *string
	num     *big.Rat // nil when not a finite number
	arr     []bound
	isArray bool
}

// colKind is how a parameter column compares.
type colKind uint8

const (
	kText colKind = iota
	kFloat
	kInt
)

// pushdown gathers, for each endpoint relation of a SELECT, the conditions
// that may narrow it, and then their domains.
type pushdown struct {
	q       *selectStmt
	params  []paramVal
	lim     *Limits
	clauses map[*relRef][]*pg.Node
	// The constant sides to evaluate, in order, and their values.
	consts []*pg.Node
	kinds  []colKind
	arrays []bool
	index  map[*pg.Node]int
	values []bound
	// Plain literals, read without a round trip.
	literals map[*pg.Node]bound
}

func newPushdown(q *selectStmt, params []paramVal, lim *Limits) *pushdown {
	p := &pushdown{q: q, params: params, lim: lim, clauses: map[*relRef][]*pg.Node{}, index: map[*pg.Node]int{},
		literals: map[*pg.Node]bound{}}
	where := conjuncts(q.sel.WhereClause)
	for _, f := range q.sel.FromClause {
		p.visitFrom(f, where)
	}
	return p
}

// visitFrom hands each relation the conditions that can only be true for
// rows of it that are not NULL-extended: WHERE and inner-join ON clauses
// above it, but for the nullable side of an outer join only that join's
// ON clause.
func (p *pushdown) visitFrom(n *pg.Node, inherited []*pg.Node) {
	if rv := n.GetRangeVar(); rv != nil {
		for _, r := range p.q.rels {
			if r.rv == rv {
				p.clauses[r] = inherited
			}
		}
		return
	}
	j := n.GetJoinExpr()
	if j == nil {
		return
	}
	on := conjuncts(j.Quals)
	switch j.Jointype {
	case pg.JoinType_JOIN_INNER:
		both := append(append([]*pg.Node(nil), inherited...), on...)
		p.visitFrom(j.Larg, both)
		p.visitFrom(j.Rarg, both)
	case pg.JoinType_JOIN_LEFT:
		p.visitFrom(j.Larg, inherited)
		p.visitFrom(j.Rarg, on)
	case pg.JoinType_JOIN_RIGHT:
		p.visitFrom(j.Larg, on)
		p.visitFrom(j.Rarg, inherited)
	default:
		p.visitFrom(j.Larg, nil)
		p.visitFrom(j.Rarg, nil)
	}
}

func conjuncts(n *pg.Node) []*pg.Node {
	if n == nil || n.Node == nil {
		return nil
	}
	if b := n.GetBoolExpr(); b != nil && b.Boolop == pg.BoolExprType_AND_EXPR {
		var out []*pg.Node
		for _, a := range b.Args {
			out = append(out, conjuncts(a)...)
		}
		return out
	}
	return []*pg.Node{n}
}

// column reports whether n is the column col of relation r, as the query
// can name it (alias.col, or col when no other relation has it).
func (p *pushdown) column(n *pg.Node, r *relRef, col string) bool {
	if cc := n.GetCollateClause(); cc != nil {
		n = cc.Arg
	}
	cr := n.GetColumnRef()
	if cr == nil {
		return false
	}
	var names []string
	for _, f := range cr.Fields {
		s := f.GetString_()
		if s == nil {
			return false
		}
		names = append(names, s.Sval)
	}
	switch len(names) {
	case 1:
		if names[0] != col {
			return false
		}
		for _, o := range p.q.rels {
			if o != r && o.table.column(col) >= 0 {
				return false // ambiguous: leave it to Postgres
			}
		}
		return true
	case 2:
		return names[0] == r.alias && names[1] == col
	}
	return false
}

// constant reports whether n refers to no column, so that it has one value
// for the whole statement.
func constant(n *pg.Node) bool {
	ok := true
	walk(n, func(x *pg.Node) {
		switch x.Node.(type) {
		case *pg.Node_ColumnRef, *pg.Node_FuncCall, *pg.Node_SubLink:
			ok = false
		}
	})
	return ok
}

// walk calls fn on n and the expression nodes under it.
func walk(n *pg.Node, fn func(*pg.Node)) {
	if n == nil || n.Node == nil {
		return
	}
	fn(n)
	switch x := n.Node.(type) {
	case *pg.Node_List:
		for _, i := range x.List.Items {
			walk(i, fn)
		}
	case *pg.Node_TypeCast:
		walk(x.TypeCast.Arg, fn)
	case *pg.Node_ResTarget:
		walk(x.ResTarget.Val, fn)
	case *pg.Node_SortBy:
		walk(x.SortBy.Node, fn)
	case *pg.Node_CollateClause:
		walk(x.CollateClause.Arg, fn)
	case *pg.Node_AExpr:
		walk(x.AExpr.Lexpr, fn)
		walk(x.AExpr.Rexpr, fn)
	case *pg.Node_BoolExpr:
		for _, a := range x.BoolExpr.Args {
			walk(a, fn)
		}
	case *pg.Node_NullTest:
		walk(x.NullTest.Arg, fn)
	case *pg.Node_BooleanTest:
		walk(x.BooleanTest.Arg, fn)
	case *pg.Node_CaseExpr:
		walk(x.CaseExpr.Arg, fn)
		for _, a := range x.CaseExpr.Args {
			walk(a, fn)
		}
		walk(x.CaseExpr.Defresult, fn)
	case *pg.Node_CaseWhen:
		walk(x.CaseWhen.Expr, fn)
		walk(x.CaseWhen.Result, fn)
	case *pg.Node_CoalesceExpr:
		for _, a := range x.CoalesceExpr.Args {
			walk(a, fn)
		}
	case *pg.Node_MinMaxExpr:
		for _, a := range x.MinMaxExpr.Args {
			walk(a, fn)
		}
	case *pg.Node_AArrayExpr:
		for _, a := range x.AArrayExpr.Elements {
			walk(a, fn)
		}
	case *pg.Node_FuncCall:
		for _, a := range x.FuncCall.Args {
			walk(a, fn)
		}
		for _, a := range x.FuncCall.AggOrder {
			walk(a, fn)
		}
		walk(x.FuncCall.AggFilter, fn)
	}
}

func operator(a *pg.A_Expr) string {
	op, ok := qualifiedName(a.Name)
	if !ok {
		return ""
	}
	return op
}

func mirror(op string) string {
	switch op {
	case "<":
		return ">"
	case "<=":
		return ">="
	case ">":
		return "<"
	case ">=":
		return "<="
	}
	return op
}

// domainOf is the domain of column col of r under condition n. With
// collect set it only records the constants to evaluate.
func (p *pushdown) domainOf(n *pg.Node, r *relRef, col string, kind colKind, collect bool) (domain, error) {
	switch {
	case n.GetBoolExpr() != nil:
		b := n.GetBoolExpr()
		if b.Boolop == pg.BoolExprType_NOT_EXPR {
			return domainAll, nil
		}
		var d domain
		if b.Boolop == pg.BoolExprType_AND_EXPR {
			d = domainAll
		}
		for _, a := range b.Args {
			da, err := p.domainOf(a, r, col, kind, collect)
			if err != nil {
				return domain{}, err
			}
			if b.Boolop == pg.BoolExprType_AND_EXPR {
				d = intersect(d, da)
			} else {
				d = union(d, da)
			}
		}
		return d, nil
	case n.GetNullTest() != nil:
		t := n.GetNullTest()
		if t.Nulltesttype == pg.NullTestType_IS_NULL && p.column(t.Arg, r, col) {
			return domain{}, nil // parameter columns are never NULL
		}
		return domainAll, nil
	case n.GetAExpr() != nil:
		return p.compare(n.GetAExpr(), r, col, kind, collect)
	}
	return domainAll, nil
}

func (p *pushdown) compare(a *pg.A_Expr, r *relRef, col string, kind colKind, collect bool) (domain, error) {
	op := operator(a)
	switch a.Kind {
	case pg.A_Expr_Kind_AEXPR_OP, pg.A_Expr_Kind_AEXPR_NOT_DISTINCT:
		if a.Kind == pg.A_Expr_Kind_AEXPR_NOT_DISTINCT {
			op = "="
		}
		other := a.Rexpr
		if !p.column(a.Lexpr, r, col) {
			if !p.column(a.Rexpr, r, col) {
				return domainAll, nil
			}
			other, op = a.Lexpr, mirror(op)
		}
		switch op {
		case "=", "<", "<=", ">", ">=":
		default:
			return domainAll, nil
		}
		if kind == kText && op != "=" || !constant(other) {
			return domainAll, nil
		}
		return p.constDomain(op, other, kind, false, collect)
	case pg.A_Expr_Kind_AEXPR_OP_ANY:
		if op != "=" || !p.column(a.Lexpr, r, col) || !constant(a.Rexpr) {
			return domainAll, nil
		}
		return p.constDomain("=", a.Rexpr, kind, true, collect)
	case pg.A_Expr_Kind_AEXPR_IN:
		l := a.Rexpr.GetList()
		if op != "=" || l == nil || !p.column(a.Lexpr, r, col) {
			return domainAll, nil
		}
		if err := p.lim.checkInList(len(l.Items)); err != nil {
			return domain{}, err
		}
		d := domain{}
		for _, it := range l.Items {
			if !constant(it) {
				return domainAll, nil
			}
			di, err := p.constDomain("=", it, kind, false, collect)
			if err != nil {
				return domain{}, err
			}
			d = union(d, di)
		}
		return d, nil
	case pg.A_Expr_Kind_AEXPR_BETWEEN:
		l := a.Rexpr.GetList()
		if kind == kText || l == nil || len(l.Items) != 2 || !p.column(a.Lexpr, r, col) ||
			!constant(l.Items[0]) || !constant(l.Items[1]) {
			return domainAll, nil
		}
		lo, err := p.constDomain(">=", l.Items[0], kind, false, collect)
		if err != nil {
			return domain{}, err
		}
		hi, err := p.constDomain("<=", l.Items[1], kind, false, collect)
		if err != nil {
			return domain{}, err
		}
		return intersect(lo, hi), nil
	}
	return domainAll, nil
}

// constDomain is the domain of "column op value". While collecting it
// records the value's expression and answers "everything".
func (p *pushdown) constDomain(op string, n *pg.Node, kind colKind, array, collect bool) (domain, error) {
	if collect {
		if b, ok := literal(n, kind); ok && !array {
			p.literals[n] = b
			return domainAll, nil
		}
		if _, ok := p.index[n]; !ok {
			p.index[n] = len(p.consts)
			p.consts = append(p.consts, n)
			p.kinds = append(p.kinds, kind)
			p.arrays = append(p.arrays, array)
		}
		return domainAll, nil
	}
	v, ok := p.literals[n]
	if !ok {
		v = p.values[p.index[n]]
	}
	if !array {
		return pointDomain(op, v, kind), nil
	}
	if v.null {
		return domain{}, nil
	}
	if !v.isArray {
		return domainAll, nil
	}
	if err := p.lim.checkInList(len(v.arr)); err != nil {
		return domain{}, err
	}
	d := domain{}
	for _, e := range v.arr {
		d = union(d, pointDomain("=", e, kind))
	}
	return d, nil
}

func pointDomain(op string, v bound, kind colKind) domain {
	if v.null {
		return domain{} // a comparison with NULL is never true
	}
	if kind == kText {
		if v.str == nil || op != "=" {
			return domainAll
		}
		return domain{strs: []string{*v.str}}
	}
	if v.num == nil {
		return domainAll // NaN, infinities, text: leave them to Postgres
	}
	r := v.num
	switch op {
	case "=":
		return domain{nums: []*big.Rat{r}}
	case "<":
		return domain{interval: true, hi: r}
	case "<=":
		return domain{interval: true, hi: r, hiInc: true}
	case ">":
		return domain{interval: true, lo: r}
	case ">=":
		return domain{interval: true, lo: r, loInc: true}
	}
	return domainAll
}

// literal reads a plain literal the way Postgres reads it when it is
// compared with a column of kind: an integer or decimal literal is an exact
// number (numeric; a float8 column compares in float8, whose input rounds
// to the nearest double as big.Rat's Float64 does), a string literal
// compared with a text column is that text. Anything else goes to Postgres.
func literal(n *pg.Node, kind colKind) (bound, bool) {
	c := n.GetAConst()
	if c == nil {
		return bound{}, false
	}
	switch {
	case c.Isnull:
		return bound{null: true}, true
	case c.GetSval() != nil && kind == kText:
		s := c.GetSval().Sval
		return bound{str: &s}, true
	case c.GetIval() != nil && kind != kText:
		return bound{num: new(big.Rat).SetInt64(int64(c.GetIval().Ival))}, true
	case c.GetFval() != nil && kind != kText:
		r, ok := new(big.Rat).SetString(c.GetFval().Fval)
		if !ok {
			return bound{}, false
		}
		if kind == kFloat {
			f, _ := r.Float64()
			return floatBound(f), true
		}
		return bound{num: r}, true
	}
	return bound{}, false
}

// domains evaluates the constants and returns, per relation, the domain
// of each of its parameter columns.
func (p *pushdown) domains(ctx context.Context, ev *evaluator, set *settings) (map[*relRef][]domain, error) {
	for _, r := range p.q.rels {
		for _, c := range r.table.cols {
			if c.param {
				for _, cl := range p.clauses[r] {
					if _, err := p.domainOf(cl, r, c.name, c.kind, true); err != nil {
						return nil, err
					}
				}
			}
		}
	}
	if len(p.consts) > 0 {
		vals, err := ev.constants(ctx, p, set)
		if err != nil {
			return nil, err
		}
		p.values = vals
	}
	out := map[*relRef][]domain{}
	for _, r := range p.q.rels {
		ds := make([]domain, len(r.table.cols))
		for i, c := range r.table.cols {
			ds[i] = domainAll
			if !c.param {
				continue
			}
			for _, cl := range p.clauses[r] {
				d, err := p.domainOf(cl, r, c.name, c.kind, false)
				if err != nil {
					return nil, err
				}
				ds[i] = intersect(ds[i], d)
			}
		}
		out[r] = ds
	}
	return out, nil
}

// constQuery is the SELECT that evaluates the constants: each is cast to
// the type its column compares in (text, float8; an integer column
// compares in the other side's type, so only a literal of unknown type is
// cast), with the statement's parameters written in as literals.
func (p *pushdown) constQuery() *pg.ParseResult {
	targets := make([]*pg.Node, len(p.consts))
	for i, n := range p.consts {
		x := proto.Clone(n).(*pg.Node)
		x = p.inlineParams(x)
		var typ string
		switch p.kinds[i] {
		case kText:
			typ = "text"
		case kFloat:
			typ = "float8"
		case kInt:
			if untyped(x) {
				typ = "int4"
			}
		}
		if typ != "" {
			x = castNode(x, typ, p.arrays[i])
		}
		targets[i] = pg.MakeResTargetNodeWithVal(x, -1)
	}
	sel := &pg.SelectStmt{TargetList: targets, LimitOption: pg.LimitOption_LIMIT_OPTION_DEFAULT, Op: pg.SetOperation_SETOP_NONE}
	return &pg.ParseResult{Stmts: []*pg.RawStmt{{Stmt: &pg.Node{Node: &pg.Node_SelectStmt{SelectStmt: sel}}}}}
}

// untyped reports a string literal without a cast: Postgres gives it the
// type of the column it is compared with.
func untyped(n *pg.Node) bool {
	c := n.GetAConst()
	return c != nil && c.GetSval() != nil
}

func castNode(x *pg.Node, typ string, array bool) *pg.Node {
	tn := &pg.TypeName{Names: []*pg.Node{pg.MakeStrNode("pg_catalog"), pg.MakeStrNode(typ)}, Typemod: -1}
	if array {
		tn.ArrayBounds = []*pg.Node{pg.MakeIntNode(-1)}
	}
	return &pg.Node{Node: &pg.Node_TypeCast{TypeCast: &pg.TypeCast{Arg: x, TypeName: tn, Location: -1}}}
}

// inlineParams replaces each $n by its value as a literal, cast to the
// type the client declared for it (a literal of unknown type otherwise,
// which Postgres resolves as it would the parameter).
func (p *pushdown) inlineParams(n *pg.Node) *pg.Node {
	if pr := n.GetParamRef(); pr != nil {
		i := int(pr.Number) - 1
		if i < 0 || i >= len(p.params) {
			return n
		}
		v := p.params[i]
		var lit *pg.Node
		if v.null {
			lit = &pg.Node{Node: &pg.Node_AConst{AConst: &pg.A_Const{Isnull: true, Location: -1}}}
		} else {
			lit = pg.MakeAConstStrNode(v.text, -1)
		}
		if name := typeNameOfOID(v.oid); name != "" {
			return &pg.Node{Node: &pg.Node_TypeCast{TypeCast: &pg.TypeCast{Arg: lit, Location: -1,
				TypeName: &pg.TypeName{Names: []*pg.Node{pg.MakeStrNode("pg_catalog"), pg.MakeStrNode(name)}, Typemod: -1}}}}
		}
		return lit
	}
	switch x := n.Node.(type) {
	case *pg.Node_TypeCast:
		x.TypeCast.Arg = p.inlineParams(x.TypeCast.Arg)
	case *pg.Node_CollateClause:
		x.CollateClause.Arg = p.inlineParams(x.CollateClause.Arg)
	case *pg.Node_AExpr:
		if x.AExpr.Lexpr != nil {
			x.AExpr.Lexpr = p.inlineParams(x.AExpr.Lexpr)
		}
		if x.AExpr.Rexpr != nil {
			x.AExpr.Rexpr = p.inlineParams(x.AExpr.Rexpr)
		}
	default:
		// Other constant nodes hold their parameters in lists of nodes.
		for _, list := range childLists(n) {
			for i := range list {
				if list[i] != nil && list[i].Node != nil {
					list[i] = p.inlineParams(list[i])
				}
			}
		}
	}
	return n
}

func childLists(n *pg.Node) [][]*pg.Node {
	switch x := n.Node.(type) {
	case *pg.Node_List:
		return [][]*pg.Node{x.List.Items}
	case *pg.Node_AArrayExpr:
		return [][]*pg.Node{x.AArrayExpr.Elements}
	case *pg.Node_BoolExpr:
		return [][]*pg.Node{x.BoolExpr.Args}
	case *pg.Node_CoalesceExpr:
		return [][]*pg.Node{x.CoalesceExpr.Args}
	case *pg.Node_MinMaxExpr:
		return [][]*pg.Node{x.MinMaxExpr.Args}
	case *pg.Node_CaseExpr:
		args := []*pg.Node{x.CaseExpr.Arg, x.CaseExpr.Defresult}
		defer func() { x.CaseExpr.Arg, x.CaseExpr.Defresult = args[0], args[1] }()
		return [][]*pg.Node{x.CaseExpr.Args, args}
	case *pg.Node_CaseWhen:
		args := []*pg.Node{x.CaseWhen.Expr, x.CaseWhen.Result}
		defer func() { x.CaseWhen.Expr, x.CaseWhen.Result = args[0], args[1] }()
		return [][]*pg.Node{args}
	}
	return nil
}

// typeNameOfOID names the built-in type a Parse declared for a parameter.
func typeNameOfOID(oid uint32) string {
	if oid == 0 || oid == pgtype.UnknownOID {
		return ""
	}
	if t, ok := typeMap.TypeForOID(oid); ok {
		return t.Name
	}
	return ""
}

var typeMap = pgtype.NewMap()

// decodeBound reads one value of the constants' query.
func decodeBound(oid uint32, src []byte) bound {
	if src == nil {
		return bound{null: true}
	}
	t, ok := typeMap.TypeForOID(oid)
	if !ok {
		return bound{}
	}
	v, err := t.Codec.DecodeValue(typeMap, oid, pgtype.BinaryFormatCode, src)
	if err != nil {
		return bound{}
	}
	return boundOf(v)
}

func boundOf(v any) bound {
	switch v := v.(type) {
	case nil:
		return bound{null: true}
	case string:
		return bound{str: &v}
	case int16:
		return bound{num: new(big.Rat).SetInt64(int64(v))}
	case int32:
		return bound{num: new(big.Rat).SetInt64(int64(v))}
	case int64:
		return bound{num: new(big.Rat).SetInt64(v)}
	case float32:
		return floatBound(float64(v))
	case float64:
		return floatBound(v)
	case pgtype.Numeric:
		if !v.Valid {
			return bound{null: true}
		}
		if v.NaN || v.InfinityModifier != pgtype.Finite || v.Int == nil {
			return bound{}
		}
		r := new(big.Rat).SetInt(v.Int)
		if v.Exp != 0 {
			p := new(big.Int).Exp(big.NewInt(10), big.NewInt(int64(abs32(v.Exp))), nil)
			if v.Exp > 0 {
				r.Mul(r, new(big.Rat).SetInt(p))
			} else {
				r.Quo(r, new(big.Rat).SetInt(p))
			}
		}
		return bound{num: r}
	case []any:
		b := bound{isArray: true, arr: make([]bound, len(v))}
		for i, e := range v {
			b.arr[i] = boundOf(e)
		}
		return b
	}
	return bound{}
}

func abs32(x int32) int32 {
	if x < 0 {
		return -x
	}
	return x
}

func floatBound(f float64) bound {
	if math.IsNaN(f) || math.IsInf(f, 0) {
		return bound{}
	}
	return bound{num: new(big.Rat).SetFloat64(f)}
}

// Domain algebra.

func intersect(a, b domain) domain {
	switch {
	case a.all:
		return b
	case b.all:
		return a
	case a.empty() || b.empty():
		return domain{}
	case a.strs != nil || b.strs != nil:
		var out []string
		for _, s := range a.strs {
			if containsString(b.strs, s) {
				out = append(out, s)
			}
		}
		return domain{strs: out}
	case a.interval && b.interval:
		d := a
		if b.lo != nil && (d.lo == nil || b.lo.Cmp(d.lo) > 0 || b.lo.Cmp(d.lo) == 0 && !b.loInc) {
			d.lo, d.loInc = b.lo, b.loInc
		}
		if b.hi != nil && (d.hi == nil || b.hi.Cmp(d.hi) < 0 || b.hi.Cmp(d.hi) == 0 && !b.hiInc) {
			d.hi, d.hiInc = b.hi, b.hiInc
		}
		if d.lo != nil && d.hi != nil {
			if c := d.lo.Cmp(d.hi); c > 0 || c == 0 && !(d.loInc && d.hiInc) {
				return domain{}
			}
		}
		return d
	case a.interval:
		return domain{nums: filterPoints(b.nums, a)}
	case b.interval:
		return domain{nums: filterPoints(a.nums, b)}
	}
	return domain{nums: filterPoints(a.nums, domain{nums: b.nums})}
}

func union(a, b domain) domain {
	switch {
	case a.all || b.all:
		return domainAll
	case a.empty():
		return b
	case b.empty():
		return a
	case a.strs != nil || b.strs != nil:
		out := append(append([]string(nil), a.strs...), b.strs...)
		sort.Strings(out)
		return domain{strs: compactStrings(out)}
	case !a.interval && !b.interval:
		all := append(append([]*big.Rat(nil), a.nums...), b.nums...)
		sort.Slice(all, func(i, j int) bool { return all[i].Cmp(all[j]) < 0 })
		var out []*big.Rat
		for i, r := range all {
			if i == 0 || r.Cmp(all[i-1]) != 0 {
				out = append(out, r)
			}
		}
		return domain{nums: out}
	}
	// The hull of the two.
	ia, ib := hull(a), hull(b)
	d := domain{interval: true}
	if ia.lo != nil && ib.lo != nil {
		d.lo, d.loInc = ia.lo, ia.loInc
		if c := ib.lo.Cmp(ia.lo); c < 0 || c == 0 && ib.loInc {
			d.lo, d.loInc = ib.lo, ib.loInc
		}
	}
	if ia.hi != nil && ib.hi != nil {
		d.hi, d.hiInc = ia.hi, ia.hiInc
		if c := ib.hi.Cmp(ia.hi); c > 0 || c == 0 && ib.hiInc {
			d.hi, d.hiInc = ib.hi, ib.hiInc
		}
	}
	return d
}

func compactStrings(s []string) []string {
	out := s[:0]
	for i, x := range s {
		if i == 0 || x != s[i-1] {
			out = append(out, x)
		}
	}
	return out
}

// hull is the closed hull of a non-empty finite set, or the interval.
func hull(d domain) domain {
	if d.interval {
		return d
	}
	return domain{interval: true, lo: d.nums[0], hi: d.nums[len(d.nums)-1], loInc: true, hiInc: true}
}

// filterPoints keeps the points inside an interval, or in a finite set.
func filterPoints(pts []*big.Rat, in domain) []*big.Rat {
	out := []*big.Rat{}
	for _, r := range pts {
		if in.contains(r) {
			out = append(out, r)
		}
	}
	return out
}

func (d domain) contains(r *big.Rat) bool {
	if !d.interval {
		i := sort.Search(len(d.nums), func(i int) bool { return d.nums[i].Cmp(r) >= 0 })
		return i < len(d.nums) && d.nums[i].Cmp(r) == 0
	}
	if d.lo != nil {
		if c := r.Cmp(d.lo); c < 0 || c == 0 && !d.loInc {
			return false
		}
	}
	if d.hi != nil {
		if c := r.Cmp(d.hi); c > 0 || c == 0 && !d.hiInc {
			return false
		}
	}
	return true
}

func containsString(sorted []string, s string) bool {
	i := sort.SearchStrings(sorted, s)
	return i < len(sorted) && sorted[i] == s
}

// textSet returns the finite set of strings a text domain allows.
func (d domain) textSet() ([]string, bool) {
	if d.all {
		return nil, false
	}
	return d.strs, true
}

func ratString(r *big.Rat) string {
	if r.IsInt() {
		return r.Num().String()
	}
	f, _ := r.Float64()
	return strconv.FormatFloat(f, 'g', -1, 64)
}
