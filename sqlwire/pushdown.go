package sqlwire

import (
	"context"
	"math"
	"math/big"
	"strconv"

	"github.com/jackc/pgx/v5/pgtype"
	pg "github.com/pganalyze/pg_query_go/v6"
	"google.golang.org/protobuf/proto"

	"github.com/sidetrend/sidetrend/sqlwire/livetables"
)

// From the conditions of a SELECT, the endpoint works out what each table
// must compute: for each parameter column (tracker, series_key, lambda,
// horizon) a superset of the values a row can have and still satisfy
// them. It computes exactly those rows; the sidecar's Postgres then runs
// the whole query over them, so the conditions only have to narrow, never
// to decide. The constants of the conditions (literals, casts, $n, arrays)
// are evaluated by that Postgres too, in one query, so that a bound means
// what Postgres means by it.

// bound is one constant side of a condition, evaluated by Postgres.
type bound struct {
	null    bool
	str     *string
	num     *big.Rat // nil when not a finite number
	arr     []bound
	isArray bool
}

// pushdown gathers, for each endpoint relation of a SELECT, the conditions
// that may narrow it, and then their domains.
type pushdown struct {
	q       *selectStmt
	params  []paramVal
	lim     *Limits
	clauses map[*relRef][]*pg.Node
	// The constant sides to evaluate, in order, and their values.
	consts []*pg.Node
	kinds  []livetables.Kind
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
			if o != r && o.table.Column(col) >= 0 {
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

// domainOf is the livetables.Domain of column col of r under condition n. With
// collect set it only records the constants to evaluate.
func (p *pushdown) domainOf(n *pg.Node, r *relRef, col string, kind livetables.Kind, collect bool) (livetables.Domain, error) {
	switch {
	case n.GetBoolExpr() != nil:
		b := n.GetBoolExpr()
		if b.Boolop == pg.BoolExprType_NOT_EXPR {
			return livetables.Everything, nil
		}
		var d livetables.Domain
		if b.Boolop == pg.BoolExprType_AND_EXPR {
			d = livetables.Everything
		}
		for _, a := range b.Args {
			da, err := p.domainOf(a, r, col, kind, collect)
			if err != nil {
				return livetables.Domain{}, err
			}
			if b.Boolop == pg.BoolExprType_AND_EXPR {
				d = livetables.Intersect(d, da)
			} else {
				d = livetables.Union(d, da)
			}
		}
		return d, nil
	case n.GetNullTest() != nil:
		t := n.GetNullTest()
		if t.Nulltesttype == pg.NullTestType_IS_NULL && p.column(t.Arg, r, col) {
			return livetables.Domain{}, nil // parameter columns are never NULL
		}
		return livetables.Everything, nil
	case n.GetAExpr() != nil:
		return p.compare(n.GetAExpr(), r, col, kind, collect)
	}
	return livetables.Everything, nil
}

func (p *pushdown) compare(a *pg.A_Expr, r *relRef, col string, kind livetables.Kind, collect bool) (livetables.Domain, error) {
	op := operator(a)
	switch a.Kind {
	case pg.A_Expr_Kind_AEXPR_OP, pg.A_Expr_Kind_AEXPR_NOT_DISTINCT:
		if a.Kind == pg.A_Expr_Kind_AEXPR_NOT_DISTINCT {
			op = "="
		}
		other := a.Rexpr
		if !p.column(a.Lexpr, r, col) {
			if !p.column(a.Rexpr, r, col) {
				return livetables.Everything, nil
			}
			other, op = a.Lexpr, mirror(op)
		}
		switch op {
		case "=", "<", "<=", ">", ">=":
		default:
			return livetables.Everything, nil
		}
		if kind == livetables.Text && op != "=" || !constant(other) {
			return livetables.Everything, nil
		}
		return p.constDomain(op, other, kind, false, collect)
	case pg.A_Expr_Kind_AEXPR_OP_ANY:
		if op != "=" || !p.column(a.Lexpr, r, col) || !constant(a.Rexpr) {
			return livetables.Everything, nil
		}
		return p.constDomain("=", a.Rexpr, kind, true, collect)
	case pg.A_Expr_Kind_AEXPR_IN:
		l := a.Rexpr.GetList()
		if op != "=" || l == nil || !p.column(a.Lexpr, r, col) {
			return livetables.Everything, nil
		}
		if err := p.lim.checkInList(len(l.Items)); err != nil {
			return livetables.Domain{}, err
		}
		d := livetables.Domain{}
		for _, it := range l.Items {
			if !constant(it) {
				return livetables.Everything, nil
			}
			di, err := p.constDomain("=", it, kind, false, collect)
			if err != nil {
				return livetables.Domain{}, err
			}
			d = livetables.Union(d, di)
		}
		return d, nil
	case pg.A_Expr_Kind_AEXPR_BETWEEN:
		l := a.Rexpr.GetList()
		if kind == livetables.Text || l == nil || len(l.Items) != 2 || !p.column(a.Lexpr, r, col) ||
			!constant(l.Items[0]) || !constant(l.Items[1]) {
			return livetables.Everything, nil
		}
		lo, err := p.constDomain(">=", l.Items[0], kind, false, collect)
		if err != nil {
			return livetables.Domain{}, err
		}
		hi, err := p.constDomain("<=", l.Items[1], kind, false, collect)
		if err != nil {
			return livetables.Domain{}, err
		}
		return livetables.Intersect(lo, hi), nil
	}
	return livetables.Everything, nil
}

// constDomain is the livetables.Domain of "column op value". While collecting it
// records the value's expression and answers "everything".
func (p *pushdown) constDomain(op string, n *pg.Node, kind livetables.Kind, array, collect bool) (livetables.Domain, error) {
	if collect {
		if b, ok := literal(n, kind); ok && !array {
			p.literals[n] = b
			return livetables.Everything, nil
		}
		if _, ok := p.index[n]; !ok {
			p.index[n] = len(p.consts)
			p.consts = append(p.consts, n)
			p.kinds = append(p.kinds, kind)
			p.arrays = append(p.arrays, array)
		}
		return livetables.Everything, nil
	}
	v, ok := p.literals[n]
	if !ok {
		v = p.values[p.index[n]]
	}
	if !array {
		return pointDomain(op, v, kind), nil
	}
	if v.null {
		return livetables.Domain{}, nil
	}
	if !v.isArray {
		return livetables.Everything, nil
	}
	if err := p.lim.checkInList(len(v.arr)); err != nil {
		return livetables.Domain{}, err
	}
	d := livetables.Domain{}
	for _, e := range v.arr {
		d = livetables.Union(d, pointDomain("=", e, kind))
	}
	return d, nil
}

func pointDomain(op string, v bound, kind livetables.Kind) livetables.Domain {
	if v.null {
		return livetables.Domain{} // a comparison with NULL is never true
	}
	if kind == livetables.Text {
		if v.str == nil || op != "=" {
			return livetables.Everything
		}
		return livetables.Domain{Strs: []string{*v.str}}
	}
	if v.num == nil {
		return livetables.Everything // NaN, infinities, text: leave them to Postgres
	}
	r := v.num
	switch op {
	case "=":
		return livetables.Domain{Nums: []*big.Rat{r}}
	case "<":
		return livetables.Domain{Interval: true, Hi: r}
	case "<=":
		return livetables.Domain{Interval: true, Hi: r, HiInc: true}
	case ">":
		return livetables.Domain{Interval: true, Lo: r}
	case ">=":
		return livetables.Domain{Interval: true, Lo: r, LoInc: true}
	}
	return livetables.Everything
}

// literal reads a plain literal the way Postgres reads it when it is
// compared with a column of kind: an integer or decimal literal is an exact
// number (numeric; a float8 column compares in float8, whose input rounds
// to the nearest double as big.Rat's Float64 does), a string literal
// compared with a text column is that text. The casts postgres_fdw writes
// after a constant (0.9::double precision, 30::integer, 'x'::text) are read
// the same way where the result is the same: to float8 or numeric from a
// number, to an integer type from an integer, to text from a string.
// Anything else goes to Postgres.
func literal(n *pg.Node, kind livetables.Kind) (bound, bool) {
	cast := ""
	if tc := n.GetTypeCast(); tc != nil {
		name, ok := qualifiedName(tc.TypeName.Names)
		if !ok || len(tc.TypeName.ArrayBounds) > 0 || len(tc.TypeName.Typmods) > 0 {
			return bound{}, false
		}
		cast, n = name, tc.Arg
	}
	c := n.GetAConst()
	if c == nil {
		return bound{}, false
	}
	number := func(r *big.Rat) (bound, bool) {
		switch cast {
		case "", "numeric", "float8":
		case "int2", "int4", "int8":
			if !r.IsInt() {
				return bound{}, false
			}
		default:
			return bound{}, false
		}
		// A float8 column compares in float8 whatever the number's type;
		// an integer column compares in float8 only with a float8.
		if kind == livetables.Float || cast == "float8" {
			f, _ := r.Float64()
			return floatBound(f), true
		}
		return bound{num: r}, true
	}
	switch {
	case c.Isnull:
		return bound{null: true}, true
	case c.GetSval() != nil && kind == livetables.Text && (cast == "" || cast == "text" || cast == "varchar"):
		s := c.GetSval().Sval
		return bound{str: &s}, true
	case c.GetIval() != nil && kind != livetables.Text:
		return number(new(big.Rat).SetInt64(int64(c.GetIval().Ival)))
	case c.GetFval() != nil && kind != livetables.Text:
		r, ok := new(big.Rat).SetString(c.GetFval().Fval)
		if !ok {
			return bound{}, false
		}
		return number(r)
	}
	return bound{}, false
}

// domains evaluates the constants and returns, per relation, the livetables.Domain
// of each of its parameter columns.
func (p *pushdown) domains(ctx context.Context, ev *evaluator, set *settings) (map[*relRef][]livetables.Domain, error) {
	for _, r := range p.q.rels {
		for _, c := range r.table.Columns {
			if c.Param {
				for _, cl := range p.clauses[r] {
					if _, err := p.domainOf(cl, r, c.Name, c.Kind, true); err != nil {
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
	out := map[*relRef][]livetables.Domain{}
	for _, r := range p.q.rels {
		ds := make([]livetables.Domain, len(r.table.Columns))
		for i, c := range r.table.Columns {
			ds[i] = livetables.Everything
			if !c.Param {
				continue
			}
			for _, cl := range p.clauses[r] {
				d, err := p.domainOf(cl, r, c.Name, c.Kind, false)
				if err != nil {
					return nil, err
				}
				ds[i] = livetables.Intersect(ds[i], d)
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
		case livetables.Text:
			typ = "text"
		case livetables.Float:
			typ = "float8"
		case livetables.Int:
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

func ratString(r *big.Rat) string {
	if r.IsInt() {
		return r.Num().String()
	}
	f, _ := r.Float64()
	return strconv.FormatFloat(f, 'g', -1, 64)
}
