package sqlwire

import (
	"context"
	"math"
	"math/big"
	"sort"
	"strconv"
	"strings"
	"time"
	"unsafe"
)

// plan is a compiled SELECT, ready to run against a Source.
type plan struct {
	rels     []relInfo
	joinKind string // "", "inner", "left" or "right"
	on       node
	where    node
	grouped  bool
	groupBy  []node
	aggs     []*aggSpec
	having   node
	targets  []node
	names    []string
	order    []orderKey
	limit    int64 // -1: none
	offset   int64
	domains  [][]domain // per relation, per column
}

type orderKey struct {
	n          node
	kind       cmpKind
	desc       bool
	nullsFirst bool
}

// resultType is the type a target reports: untyped literals and bare NULLs
// come out as text, as in Postgres 10 and later.
func resultType(n node) typ {
	switch t := n.typ(); t {
	case tUnknown, tNull:
		return tText
	default:
		return t
	}
}

// buildPlan compiles s with the given parameters. loc is the session's
// TimeZone for timestamps without an offset; lim, when not nil, bounds the
// IN lists.
func buildPlan(s *selectStmt, params []paramVal, loc *time.Location, lim *Limits) (*plan, error) {
	p := &plan{limit: -1}
	c := &compiler{params: params, loc: loc, lim: lim}
	for _, tr := range s.from {
		if tr.schema != "" && tr.schema != Schema {
			return nil, errorf(codeUndefinedTable, "relation \"%s.%s\" does not exist", tr.schema, tr.name).
				withHint("the endpoint serves %s.forecast, %s.backtest and %s.series", Schema, Schema, Schema)
		}
		t, ok := tables[tr.name]
		if !ok {
			name := tr.name
			if tr.schema != "" {
				name = tr.schema + "." + name
			}
			return nil, errorf(codeUndefinedTable, "relation %q does not exist", name).
				withHint("the endpoint serves %s.forecast, %s.backtest and %s.series", Schema, Schema, Schema)
		}
		alias := tr.alias
		if alias == "" {
			alias = tr.name
		}
		for _, r := range c.rels {
			if r.alias == alias {
				return nil, errorf("42712", "table name %q specified more than once", alias)
			}
		}
		c.rels = append(c.rels, relInfo{alias: alias, table: t})
	}
	p.rels = c.rels
	if s.join != nil {
		switch s.join.kind {
		case "inner", "left", "right":
			p.joinKind = s.join.kind
		default:
			return nil, notSupported("%s JOIN of sidetrend_live tables is not supported remotely", strings.ToUpper(s.join.kind)).
				withHint("join them on the local side, for example through a subquery with OFFSET 0")
		}
	}

	if err := expandStars(s, c.rels); err != nil {
		return nil, err
	}
	var err error
	if s.where != nil {
		c.clause = "WHERE"
		if p.where, err = c.compileBool(s.where, "WHERE"); err != nil {
			return nil, err
		}
	}
	if s.join != nil && s.join.on != nil {
		c.clause = "JOIN conditions"
		if p.on, err = c.compileBool(s.join.on, "JOIN/ON"); err != nil {
			return nil, err
		}
	}
	c.clause = ""

	p.grouped = len(s.groupBy) > 0 || s.having != nil
	for _, t := range s.targets {
		if containsAggregate(t.x) {
			p.grouped = true
		}
	}
	for _, o := range s.orderBy {
		if containsAggregate(o.x) {
			p.grouped = true
		}
	}
	if p.grouped {
		c.clause = "GROUP BY"
		for _, g := range s.groupBy {
			if k, ok := positional(g); ok {
				if k < 1 || k > len(s.targets) {
					return nil, errorf("42P10", "GROUP BY position %d is not in select list", k)
				}
				g = s.targets[k-1].x
				if containsAggregate(g) {
					return nil, errorf(codeGrouping, "aggregate functions are not allowed in GROUP BY")
				}
			}
			n, err := c.compile(g)
			if err != nil {
				return nil, err
			}
			p.groupBy = append(p.groupBy, n)
			c.groupTexts = append(c.groupTexts, c.canonical(g))
			c.groupNodes = append(c.groupNodes, n)
		}
		c.clause = ""
		c.grouped = true
	}

	for _, t := range s.targets {
		n, err := c.compile(t.x)
		if err != nil {
			return nil, err
		}
		if n.typ() == tUnknown {
			if n, err = c.coerceUnknown(n, tText); err != nil {
				return nil, err
			}
		}
		if isArrayNode(n) {
			return nil, notSupported("array results are not supported")
		}
		p.targets = append(p.targets, n)
		p.names = append(p.names, targetName(t))
	}
	if s.having != nil {
		if p.having, err = c.compileBool(s.having, "HAVING"); err != nil {
			return nil, err
		}
	}
	for _, o := range s.orderBy {
		var n node
		if k, ok := positional(o.x); ok {
			if k < 1 || k > len(p.targets) {
				return nil, errorf("42P10", "ORDER BY position %d is not in select list", k)
			}
			n = p.targets[k-1]
		} else if r, ok := o.x.(*colRef); ok && r.rel == "" {
			for i, t := range s.targets {
				if t.alias == r.name {
					n = p.targets[i]
					break
				}
			}
		}
		if n == nil {
			if n, err = c.compile(o.x); err != nil {
				return nil, err
			}
		}
		kind, _ := compareKind(resultType(n), resultType(n))
		p.order = append(p.order, orderKey{n: n, kind: kind, desc: o.desc, nullsFirst: o.nullsFirst})
	}
	p.aggs = c.aggs

	limits := &compiler{params: params, loc: loc, lim: lim, clause: "LIMIT"}
	if s.limit != nil {
		if p.limit, err = limitValue(limits, s.limit, "LIMIT"); err != nil {
			return nil, err
		}
	}
	if s.offset != nil {
		if p.offset, err = limitValue(limits, s.offset, "OFFSET"); err != nil {
			return nil, err
		}
		if p.offset < 0 {
			p.offset = 0
		}
	} else {
		p.offset = 0
	}

	p.domains = make([][]domain, len(p.rels))
	for i, r := range p.rels {
		cond := p.conditionsFor(i)
		doms := make([]domain, len(r.table.cols))
		for j, col := range r.table.cols {
			kind, _ := compareKind(col.t, col.t)
			if col.param {
				doms[j] = domainOf(cond, i, j, kind)
			} else {
				doms[j] = domainAll(kind)
			}
		}
		p.domains[i] = doms
	}
	return p, nil
}

// expandStars replaces * and rel.* in the select list by the columns.
func expandStars(s *selectStmt, rels []relInfo) error {
	var out []target
	for _, t := range s.targets {
		if t.star == "" {
			out = append(out, t)
			continue
		}
		found := false
		for _, r := range rels {
			if t.star != "*" && t.star != r.alias && t.star != r.table.name {
				continue
			}
			found = true
			for _, c := range r.table.cols {
				ref := &colRef{name: c.name}
				if len(rels) > 1 {
					ref.rel = r.alias
				}
				out = append(out, target{x: ref})
			}
		}
		if !found {
			if t.star == "*" {
				return errorf(codeSyntax, "SELECT * with no tables specified is not valid")
			}
			return errorf(codeUndefinedTable, "missing FROM-clause entry for table %q", t.star)
		}
	}
	s.targets = out
	return nil
}

// conditionsFor is the condition every row of relation i that reaches the
// result satisfies: WHERE and ON for an inner join; for an outer join only
// the conditions that cannot be satisfied by a NULL-extended row of that
// relation (WHERE for the preserved side, ON for the nullable side).
func (p *plan) conditionsFor(i int) node {
	var parts []node
	add := func(n node) {
		if n != nil {
			parts = append(parts, n)
		}
	}
	nullable := p.joinKind == "left" && i == 1 || p.joinKind == "right" && i == 0
	if !nullable {
		add(p.where)
	}
	if p.joinKind == "inner" || nullable {
		add(p.on)
	}
	switch len(parts) {
	case 0:
		return nil
	case 1:
		return parts[0]
	}
	return &andNode{args: parts}
}

func targetName(t target) string {
	if t.alias != "" {
		return t.alias
	}
	switch x := t.x.(type) {
	case *colRef:
		return x.name
	case *funcCall:
		return x.name
	case *castExpr:
		if r, ok := x.x.(*colRef); ok {
			return r.name
		}
		return map[typ]string{tText: "text", tInt4: "int4", tInt8: "int8", tFloat8: "float8",
			tNumeric: "numeric", tBool: "bool", tTimestamptz: "timestamptz", tInt2: "int2", tFloat4: "float4"}[x.t]
	}
	return "?column?"
}

// positional reports whether x is an integer literal (GROUP BY 1).
func positional(x expr) (int, bool) {
	c, ok := x.(*constExpr)
	if !ok || c.v.null || !c.v.t.isInt() {
		return 0, false
	}
	return int(c.v.i), true
}

// limitValue evaluates a LIMIT or OFFSET; NULL means none (-1).
func limitValue(c *compiler, x expr, what string) (int64, error) {
	n, err := c.compile(x)
	if err != nil {
		return 0, err
	}
	if n.typ() == tUnknown {
		if n, err = c.coerceUnknown(n, tInt8); err != nil {
			return 0, err
		}
	}
	n, err = fold(&castNode{x: n, to: tInt8, prec: -1, scale: -1, loc: c.loc})
	if err != nil {
		return 0, err
	}
	v, ok := isConstNode(n)
	if !ok {
		return 0, notSupported("%s must be a constant", what)
	}
	if v.null {
		return -1, nil
	}
	if v.i < 0 {
		if what == "LIMIT" {
			return 0, errorf("2201W", "LIMIT must not be negative")
		}
		return 0, errorf("2201X", "OFFSET must not be negative")
	}
	return v.i, nil
}

// open starts the query and returns an iterator over result rows. b, when
// not nil, is what the query may compute and hold.
func (p *plan) open(ctx context.Context, src Source, b *budget) (rowIter, error) {
	in, err := p.input(ctx, src, b)
	if err != nil {
		return nil, err
	}
	if !p.grouped && len(p.order) == 0 {
		return &streamIter{p: p, in: in, out: make([]value, len(p.targets)), left: p.limit, skip: p.offset}, nil
	}
	rows, err := p.collect(ctx, in, b)
	if err != nil {
		return nil, err
	}
	return &sliceIter{rows: rows}, nil
}

// inputIter yields the environments (one row per relation) of FROM.
type inputIter interface {
	next(ctx context.Context) (*env, error)
}

func (p *plan) input(ctx context.Context, src Source, b *budget) (inputIter, error) {
	if len(p.rels) == 0 {
		return &oneEnv{}, nil
	}
	scan := func(i int, heldPerRow int64) (rowIter, error) {
		if b == nil {
			return p.rels[i].table.scan(ctx, &scanRequest{src: src, domains: p.domains[i]})
		}
		b.heldPerRow = heldPerRow
		it, err := p.rels[i].table.scan(ctx, &scanRequest{src: src, domains: p.domains[i], budget: b})
		b.heldPerRow = 0
		if err != nil {
			return nil, err
		}
		return &countIter{it: it, b: b}, nil
	}
	// A sort without grouping holds each row that passes WHERE.
	var sortedRow int64
	if !p.grouped && len(p.order) > 0 {
		sortedRow = int64(len(p.targets)+len(p.order)) * valueBytes
	}
	if len(p.rels) == 1 {
		it, err := scan(0, sortedRow)
		if err != nil {
			return nil, err
		}
		return &scanEnv{it: it, e: &env{rows: make([][]value, 1)}}, nil
	}
	outer, inner := 0, 1
	if p.joinKind == "right" {
		outer, inner = 1, 0
	}
	innerIt, err := scan(inner, int64(len(p.rels[inner].table.cols))*valueBytes)
	if err != nil {
		return nil, err
	}
	var innerRows [][]value
	for {
		r, err := innerIt.next(ctx)
		if err != nil {
			return nil, err
		}
		if r == nil {
			break
		}
		if err := b.hold(r, "the join"); err != nil {
			return nil, err
		}
		innerRows = append(innerRows, append([]value(nil), r...))
	}
	outerIt, err := scan(outer, sortedRow)
	if err != nil {
		return nil, err
	}
	return &joinEnv{p: p, b: b, outer: outerIt, innerRows: innerRows, outerIdx: outer, innerIdx: inner,
		e: &env{rows: make([][]value, 2)}}, nil
}

type oneEnv struct{ done bool }

func (o *oneEnv) next(context.Context) (*env, error) {
	if o.done {
		return nil, nil
	}
	o.done = true
	return &env{}, nil
}

type scanEnv struct {
	it rowIter
	e  *env
}

func (s *scanEnv) next(ctx context.Context) (*env, error) {
	r, err := s.it.next(ctx)
	if err != nil || r == nil {
		return nil, err
	}
	s.e.rows[0] = r
	return s.e, nil
}

// joinEnv is a nested loop over the outer scan and the materialised inner
// rows, with the ON condition; outer joins add NULL-extended rows.
type joinEnv struct {
	p                  *plan
	b                  *budget
	outer              rowIter
	innerRows          [][]value
	outerIdx, innerIdx int
	e                  *env
	cur                []value
	j                  int
	matched            bool
}

func (j *joinEnv) next(ctx context.Context) (*env, error) {
	for {
		if j.cur == nil {
			r, err := j.outer.next(ctx)
			if err != nil || r == nil {
				return nil, err
			}
			j.cur = append(j.cur[:0:0], r...)
			j.j, j.matched = 0, false
		}
		for j.j < len(j.innerRows) {
			in := j.innerRows[j.j]
			j.j++
			if j.j%1024 == 0 && ctx.Err() != nil {
				return nil, statementCanceled(ctx)
			}
			j.e.rows[j.outerIdx], j.e.rows[j.innerIdx] = j.cur, in
			if j.p.on != nil {
				ok, err := isTrue(j.p.on, j.e)
				if err != nil {
					return nil, err
				}
				if !ok {
					continue
				}
			}
			j.matched = true
			if err := j.b.computed(1); err != nil {
				return nil, err
			}
			return j.e, nil
		}
		cur, matched := j.cur, j.matched
		j.cur = nil
		if j.p.joinKind != "inner" && !matched {
			j.e.rows[j.outerIdx], j.e.rows[j.innerIdx] = cur, nil
			return j.e, nil
		}
	}
}

func isTrue(n node, e *env) (bool, error) {
	v, err := n.eval(e)
	if err != nil {
		return false, err
	}
	return !v.null && v.i != 0, nil
}

// streamIter filters and projects rows as they are fetched.
type streamIter struct {
	p    *plan
	in   inputIter
	out  []value
	left int64 // rows still allowed by LIMIT, -1 for no limit
	skip int64
}

func (s *streamIter) next(ctx context.Context) ([]value, error) {
	for {
		if s.left == 0 {
			return nil, nil
		}
		e, err := s.in.next(ctx)
		if err != nil || e == nil {
			return nil, err
		}
		if s.p.where != nil {
			ok, err := isTrue(s.p.where, e)
			if err != nil {
				return nil, err
			}
			if !ok {
				continue
			}
		}
		if s.skip > 0 {
			s.skip--
			continue
		}
		for i, t := range s.p.targets {
			v, err := t.eval(e)
			if err != nil {
				return nil, err
			}
			s.out[i] = v
		}
		if s.left > 0 {
			s.left--
		}
		return s.out, nil
	}
}

// collect runs a grouped or sorted query to completion and returns its
// result rows after ORDER BY, OFFSET and LIMIT.
func (p *plan) collect(ctx context.Context, in inputIter, b *budget) ([][]value, error) {
	type sorted struct {
		out, keys []value
	}
	var rows []sorted
	emit := func(e *env) error {
		r := sorted{out: make([]value, len(p.targets)), keys: make([]value, len(p.order))}
		for i, t := range p.targets {
			v, err := t.eval(e)
			if err != nil {
				return err
			}
			r.out[i] = v
		}
		for i, o := range p.order {
			v, err := o.n.eval(e)
			if err != nil {
				return err
			}
			r.keys[i] = v
		}
		if err := b.hold(r.out, "ORDER BY"); err != nil {
			return err
		}
		if err := b.hold(r.keys, "ORDER BY"); err != nil {
			return err
		}
		rows = append(rows, r)
		return nil
	}

	var groups []*group
	index := map[string]*group{}
	var keyBuf []byte
	for {
		e, err := in.next(ctx)
		if err != nil {
			return nil, err
		}
		if e == nil {
			break
		}
		if p.where != nil {
			ok, err := isTrue(p.where, e)
			if err != nil {
				return nil, err
			}
			if !ok {
				continue
			}
		}
		if !p.grouped {
			if err := emit(e); err != nil {
				return nil, err
			}
			continue
		}
		keys := make([]value, len(p.groupBy))
		keyBuf = keyBuf[:0]
		for i, g := range p.groupBy {
			v, err := g.eval(e)
			if err != nil {
				return nil, err
			}
			keys[i] = v
			keyBuf = appendGroupKey(keyBuf, v)
		}
		gr := index[string(keyBuf)]
		if gr == nil {
			if err := b.hold(keys, "GROUP BY"); err != nil {
				return nil, err
			}
			// Each aggregate's state, and the index entry.
			if err := b.holdBytes(int64(len(p.aggs))*int64(unsafe.Sizeof(aggAcc{}))+int64(len(keyBuf))+64, "GROUP BY"); err != nil {
				return nil, err
			}
			gr = newGroup(keys, p.aggs)
			index[string(keyBuf)] = gr
			groups = append(groups, gr)
		}
		for _, a := range gr.accs {
			if err := a.add(e); err != nil {
				return nil, err
			}
		}
	}
	if p.grouped {
		if len(groups) == 0 && len(p.groupBy) == 0 {
			groups = append(groups, newGroup(nil, p.aggs))
		}
		for _, gr := range groups {
			row := &groupRow{keys: gr.keys, aggs: make([]value, len(gr.accs))}
			for i, a := range gr.accs {
				v, err := a.finish()
				if err != nil {
					return nil, err
				}
				row.aggs[i] = v
			}
			e := &env{group: row}
			if p.having != nil {
				ok, err := isTrue(p.having, e)
				if err != nil {
					return nil, err
				}
				if !ok {
					continue
				}
			}
			if err := emit(e); err != nil {
				return nil, err
			}
		}
	}
	if len(p.order) > 0 {
		sort.SliceStable(rows, func(i, j int) bool {
			for k, o := range p.order {
				c := orderCompare(o, rows[i].keys[k], rows[j].keys[k])
				if c != 0 {
					return c < 0
				}
			}
			return false
		})
	}
	start := min(p.offset, int64(len(rows)))
	end := int64(len(rows))
	if p.limit >= 0 && start+p.limit < end {
		end = start + p.limit
	}
	out := make([][]value, 0, end-start)
	for _, r := range rows[start:end] {
		out = append(out, r.out)
	}
	return out, nil
}

// orderCompare compares two sort keys as ORDER BY does.
func orderCompare(o orderKey, a, b value) int {
	switch {
	case a.null && b.null:
		return 0
	case a.null:
		if o.nullsFirst {
			return -1
		}
		return 1
	case b.null:
		if o.nullsFirst {
			return 1
		}
		return -1
	}
	c := compareValues(o.kind, a, b)
	if o.desc {
		return -c
	}
	return c
}

// appendGroupKey appends an unambiguous encoding of v for grouping: NULLs
// group together, and equal values (in their type) encode equally.
func appendGroupKey(dst []byte, v value) []byte {
	if v.null {
		return append(dst, 'N', 0)
	}
	switch {
	case v.t.isFloat():
		f := v.f
		if f == 0 {
			f = 0 // -0 and +0 group together
		}
		if math.IsNaN(f) {
			return append(dst, 'F', 'n', 0)
		}
		dst = append(dst, 'F')
		dst = strconv.AppendUint(dst, math.Float64bits(f), 16)
	case v.t == tNumeric:
		dst = append(dst, 'R')
		dst = append(dst, v.n.RatString()...)
	case v.t == tText || v.t == tUnknown:
		dst = append(dst, 'T')
		dst = strconv.AppendInt(dst, int64(len(v.s)), 10)
		dst = append(dst, ':')
		dst = append(dst, v.s...)
	default:
		dst = append(dst, 'I')
		dst = strconv.AppendInt(dst, v.i, 10)
	}
	return append(dst, 0)
}

// Aggregates.

// aggSpec is one aggregate call of a grouped query.
type aggSpec struct {
	fn       string
	star     bool
	distinct bool
	arg      node
	filter   node
	t        typ
}

type group struct {
	keys []value
	accs []*aggAcc
}

func newGroup(keys []value, specs []*aggSpec) *group {
	g := &group{keys: keys, accs: make([]*aggAcc, len(specs))}
	for i, s := range specs {
		g.accs[i] = &aggAcc{spec: s}
	}
	return g
}

// aggAcc accumulates one aggregate for one group with Postgres' semantics:
// count counts non-NULL inputs, sum and avg of integers are exact, sum of
// float8 adds in row order and fails on overflow, min and max skip NULLs.
type aggAcc struct {
	spec *aggSpec
	n    int64
	isum *big.Int
	rsum *big.Rat
	rsc  int
	fsum float64
	best value
	has  bool
	seen map[string]bool
}

func (a *aggAcc) add(e *env) error {
	s := a.spec
	if s.filter != nil {
		ok, err := isTrue(s.filter, e)
		if err != nil || !ok {
			return err
		}
	}
	if s.star {
		a.n++
		return nil
	}
	v, err := s.arg.eval(e)
	if err != nil || v.null {
		return err
	}
	if s.distinct {
		if a.seen == nil {
			a.seen = map[string]bool{}
		}
		k := string(appendGroupKey(nil, v))
		if a.seen[k] {
			return nil
		}
		a.seen[k] = true
	}
	a.n++
	at := s.arg.typ()
	switch s.fn {
	case "count":
	case "sum", "avg":
		switch {
		case at.isInt():
			if a.isum == nil {
				a.isum = new(big.Int)
			}
			a.isum.Add(a.isum, big.NewInt(v.i))
			if s.fn == "sum" && s.t == tInt8 && !a.isum.IsInt64() {
				return errorf(codeOutOfRange, "bigint out of range")
			}
		case at == tNumeric:
			if a.rsum == nil {
				a.rsum = new(big.Rat)
			}
			a.rsum.Add(a.rsum, v.n)
			a.rsc = max(a.rsc, int(v.i))
		case at == tFloat4 && s.fn == "sum":
			r := float64(float32(a.fsum) + float32(v.f))
			if math.IsInf(r, 0) && !math.IsInf(a.fsum, 0) && !math.IsInf(v.f, 0) {
				return errorf(codeOutOfRange, "value out of range: overflow")
			}
			a.fsum = r
		default:
			r := a.fsum + v.f
			if math.IsInf(r, 0) && !math.IsInf(a.fsum, 0) && !math.IsInf(v.f, 0) {
				return errorf(codeOutOfRange, "value out of range: overflow")
			}
			a.fsum = r
		}
	case "min", "max":
		kind, _ := compareKind(at, at)
		if !a.has {
			a.best, a.has = v, true
			return nil
		}
		c := compareValues(kind, v, a.best)
		if s.fn == "min" && c < 0 || s.fn == "max" && c > 0 {
			a.best = v
		}
	}
	return nil
}

func (a *aggAcc) finish() (value, error) {
	s := a.spec
	if s.fn == "count" {
		return int8Val(a.n), nil
	}
	if a.n == 0 {
		return nullOf(s.t), nil
	}
	at := s.arg.typ()
	switch s.fn {
	case "sum":
		switch {
		case s.t == tInt8:
			return int8Val(a.isum.Int64()), nil
		case at.isInt():
			return numericVal(new(big.Rat).SetInt(a.isum), 0), nil
		case at == tNumeric:
			return numericVal(new(big.Rat).Set(a.rsum), a.rsc), nil
		}
		return value{t: s.t, f: a.fsum}, nil
	case "avg":
		count := numericVal(new(big.Rat).SetInt64(a.n), 0)
		switch {
		case at.isInt():
			sum := numericVal(new(big.Rat).SetInt(a.isum), 0)
			return arith(tNumeric, "/", sum, count)
		case at == tNumeric:
			return arith(tNumeric, "/", numericVal(a.rsum, a.rsc), count)
		}
		return float8Val(a.fsum / float64(a.n)), nil
	}
	return a.best, nil
}
