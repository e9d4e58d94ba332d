package sqlwire

import (
	"math"
	"math/big"
	"sort"
)

// domain is what a WHERE clause lets one column be: every row that
// satisfies the clause has its value of the column in the domain (the
// converse need not hold). Tables use the domains of their parameter
// columns (tracker, series_key, lambda, horizon) to decide which rows to
// compute; every computed row is then checked against the whole clause, so
// a domain only has to be a superset, never exact.
//
// A domain is everything, a finite set, or (for numeric columns) an
// interval whose ends may be open, closed or absent. Numbers are kept as
// exact rationals, so integer columns compared with numeric or float
// bounds lose nothing.
type domain struct {
	all      bool
	numeric  bool
	interval bool
	pts      []*big.Rat // numeric finite set, sorted, no duplicates
	vals     []value    // non-numeric finite set
	lo, hi   *big.Rat   // interval ends, nil when absent
	loInc    bool
	hiInc    bool
	kind     cmpKind // how the non-numeric values compare
}

func isNumericKind(k cmpKind) bool { return k == cmpInt || k == cmpFloat || k == cmpNumeric }

func domainAll(k cmpKind) domain { return domain{all: true, numeric: isNumericKind(k), kind: k} }

func domainEmpty(k cmpKind) domain { return domain{numeric: isNumericKind(k), kind: k} }

func (d domain) empty() bool {
	return !d.all && !d.interval && len(d.pts) == 0 && len(d.vals) == 0
}

// domainOf computes the domain of column (rel, col) under the boolean node
// n, for a column whose values compare in kind.
func domainOf(n node, rel, col int, kind cmpKind) domain {
	switch n := n.(type) {
	case nil:
		return domainAll(kind)
	case *constNode:
		if n.v.null || n.v.t == tBool && n.v.i == 0 {
			return domainEmpty(kind)
		}
		return domainAll(kind)
	case *andNode:
		d := domainAll(kind)
		for _, a := range n.args {
			d = intersect(d, domainOf(a, rel, col, kind))
		}
		return d
	case *orNode:
		d := domainEmpty(kind)
		for _, a := range n.args {
			d = union(d, domainOf(a, rel, col, kind))
		}
		return d
	case *cmpNode:
		op := n.op
		other, ok := columnSide(n.l, n.r, rel, col)
		if !ok {
			if other, ok = columnSide(n.r, n.l, rel, col); !ok {
				return domainAll(kind)
			}
			op = mirror(op)
		}
		v, isConst := isConstNode(other)
		if !isConst {
			return domainAll(kind)
		}
		if v.null {
			return domainEmpty(kind)
		}
		return compareDomain(op, v, n.kind, kind)
	case *anyNode:
		if !n.any || n.op != "=" {
			return domainAll(kind)
		}
		if _, ok := columnSide(n.l, nil, rel, col); !ok {
			return domainAll(kind)
		}
		arr, ok := isConstNode(n.r)
		if !ok {
			return domainAll(kind)
		}
		if arr.null {
			return domainEmpty(kind)
		}
		d := domainEmpty(kind)
		for _, el := range arr.arr {
			if !el.null {
				d = union(d, compareDomain("=", el, n.kind, kind))
			}
		}
		return d
	case *distinctNode:
		if !n.not {
			return domainAll(kind)
		}
		other, ok := columnSide(n.l, n.r, rel, col)
		if !ok {
			if other, ok = columnSide(n.r, n.l, rel, col); !ok {
				return domainAll(kind)
			}
		}
		v, isConst := isConstNode(other)
		if !isConst {
			return domainAll(kind)
		}
		if v.null {
			return domainEmpty(kind) // parameter columns are never NULL
		}
		return compareDomain("=", v, n.kind, kind)
	case *nullTestNode:
		if _, ok := columnSide(n.x, nil, rel, col); ok && !n.not {
			return domainEmpty(kind) // parameter columns are never NULL
		}
		return domainAll(kind)
	}
	return domainAll(kind)
}

// columnSide reports whether a is column (rel, col) and returns b.
func columnSide(a, b node, rel, col int) (node, bool) {
	c, ok := a.(*colNode)
	if !ok || c.rel != rel || c.col != col {
		return nil, false
	}
	return b, true
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

// compareDomain is the domain of "column op v", the comparison made in
// domain ck, for a column whose values compare in kind.
func compareDomain(op string, v value, ck, kind cmpKind) domain {
	if !isNumericKind(kind) {
		if op == "=" && ck == kind {
			return domain{vals: []value{v}, kind: kind}
		}
		return domainAll(kind)
	}
	if !isNumericKind(ck) {
		return domainAll(kind)
	}
	var r *big.Rat
	if ck == cmpFloat {
		f := v.asFloat()
		if math.IsNaN(f) || math.IsInf(f, 0) {
			return domainAll(kind) // leave NaN and infinite bounds to the filter
		}
		r = new(big.Rat).SetFloat64(f)
	} else {
		r = v.rat()
	}
	switch op {
	case "=":
		return domain{numeric: true, pts: []*big.Rat{r}, kind: kind}
	case "<":
		return domain{numeric: true, interval: true, hi: r, kind: kind}
	case "<=":
		return domain{numeric: true, interval: true, hi: r, hiInc: true, kind: kind}
	case ">":
		return domain{numeric: true, interval: true, lo: r, kind: kind}
	case ">=":
		return domain{numeric: true, interval: true, lo: r, loInc: true, kind: kind}
	}
	return domainAll(kind)
}

func intersect(a, b domain) domain {
	switch {
	case a.all:
		return b
	case b.all:
		return a
	case a.empty() || b.empty():
		return domainEmpty(a.kind)
	case !a.numeric:
		var out []value
		for _, x := range a.vals {
			for _, y := range b.vals {
				if compareValues(a.kind, x, y) == 0 {
					out = append(out, x)
					break
				}
			}
		}
		return domain{vals: out, kind: a.kind}
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
				return domainEmpty(a.kind)
			}
		}
		return d
	case a.interval:
		return domain{numeric: true, pts: filterPoints(b.pts, a), kind: a.kind}
	case b.interval:
		return domain{numeric: true, pts: filterPoints(a.pts, b), kind: a.kind}
	}
	var out []*big.Rat
	for _, x := range a.pts {
		if i := sort.Search(len(b.pts), func(i int) bool { return b.pts[i].Cmp(x) >= 0 }); i < len(b.pts) && b.pts[i].Cmp(x) == 0 {
			out = append(out, x)
		}
	}
	return domain{numeric: true, pts: out, kind: a.kind}
}

func union(a, b domain) domain {
	switch {
	case a.all || b.all:
		return domainAll(a.kind)
	case a.empty():
		return b
	case b.empty():
		return a
	case !a.numeric:
		out := append([]value(nil), a.vals...)
		for _, y := range b.vals {
			dup := false
			for _, x := range out {
				if compareValues(a.kind, x, y) == 0 {
					dup = true
					break
				}
			}
			if !dup {
				out = append(out, y)
			}
		}
		return domain{vals: out, kind: a.kind}
	case !a.interval && !b.interval:
		all := append(append([]*big.Rat(nil), a.pts...), b.pts...)
		sort.Slice(all, func(i, j int) bool { return all[i].Cmp(all[j]) < 0 })
		var out []*big.Rat
		for i, r := range all {
			if i == 0 || r.Cmp(all[i-1]) != 0 {
				out = append(out, r)
			}
		}
		return domain{numeric: true, pts: out, kind: a.kind}
	}
	// The hull of the two.
	ia, ib := asInterval(a), asInterval(b)
	d := domain{numeric: true, interval: true, kind: a.kind}
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

// asInterval returns the closed hull of a non-empty numeric set, or the
// interval itself.
func asInterval(d domain) domain {
	if d.interval {
		return d
	}
	return domain{numeric: true, interval: true, lo: d.pts[0], hi: d.pts[len(d.pts)-1], loInc: true, hiInc: true, kind: d.kind}
}

func filterPoints(pts []*big.Rat, iv domain) []*big.Rat {
	var out []*big.Rat
	for _, r := range pts {
		if iv.contains(r) {
			out = append(out, r)
		}
	}
	return out
}

// contains reports whether r is inside the interval's bounds.
func (d domain) contains(r *big.Rat) bool {
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

// textSet returns the finite, sorted set of strings a text domain allows.
func (d domain) textSet() ([]string, bool) {
	if d.all {
		return nil, false
	}
	out := make([]string, 0, len(d.vals))
	for _, v := range d.vals {
		out = append(out, v.s)
	}
	sort.Strings(out)
	return out, true
}
