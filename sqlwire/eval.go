package sqlwire

import (
	"math"
	"math/big"
	"sort"
	"strconv"
	"strings"
	"time"
	"unicode/utf8"
)

// node is a compiled, typed expression. eval returns its value for the
// rows in env; nodes never see untyped input at run time except parameters
// and literals of unknown type, which compile resolves from context.
type node interface {
	typ() typ
	eval(e *env) (value, error)
}

// env is what a node reads: the current row of each relation (nil for the
// NULL side of an outer join) and, in a grouped query, the current group.
type env struct {
	rows  [][]value
	group *groupRow
}

// groupRow is one group of a grouped query: its key values and the
// finished aggregate values.
type groupRow struct {
	keys []value
	aggs []value
}

type colNode struct {
	rel, col int
	t        typ
}

func (n *colNode) typ() typ { return n.t }
func (n *colNode) eval(e *env) (value, error) {
	r := e.rows[n.rel]
	if r == nil {
		return nullOf(n.t), nil
	}
	return r[n.col], nil
}

type constNode struct{ v value }

func (n *constNode) typ() typ                 { return n.v.t }
func (n *constNode) eval(*env) (value, error) { return n.v, nil }
func constOf(v value) *constNode              { return &constNode{v: v} }
func isConstNode(n node) (value, bool) {
	c, ok := n.(*constNode)
	if !ok {
		return value{}, false
	}
	return c.v, true
}

// groupKeyNode is a GROUP BY expression referenced in a grouped query.
type groupKeyNode struct {
	idx int
	t   typ
}

func (n *groupKeyNode) typ() typ { return n.t }
func (n *groupKeyNode) eval(e *env) (value, error) {
	return e.group.keys[n.idx], nil
}

// aggRefNode is the finished value of aggregate idx of the current group.
type aggRefNode struct {
	idx int
	t   typ
}

func (n *aggRefNode) typ() typ { return n.t }
func (n *aggRefNode) eval(e *env) (value, error) {
	return e.group.aggs[n.idx], nil
}

type castNode struct {
	x           node
	to          typ
	array       bool
	prec, scale int
	loc         *time.Location
}

func (n *castNode) typ() typ { return n.to }
func (n *castNode) eval(e *env) (value, error) {
	v, err := n.x.eval(e)
	if err != nil {
		return value{}, err
	}
	if n.array {
		if v.null {
			return value{t: n.to, array: true, null: true}, nil
		}
		if !v.array {
			if v.t != tUnknown && v.t != tText {
				return value{}, errorf(codeCannotCoerce, "cannot cast type %s to %s[]", v.t, n.to)
			}
			return parseArrayLiteral(v.s, n.to, n.loc)
		}
		out := value{t: n.to, array: true, arr: make([]value, len(v.arr))}
		for i, el := range v.arr {
			c, err := castValue(el, n.to, n.prec, n.scale, n.loc)
			if err != nil {
				return value{}, err
			}
			out.arr[i] = c
		}
		return out, nil
	}
	if v.array {
		return value{}, errorf(codeCannotCoerce, "cannot cast type %s[] to %s", v.t, n.to)
	}
	return castValue(v, n.to, n.prec, n.scale, n.loc)
}

// cmpKind is the domain two values are compared in.
type cmpKind uint8

const (
	cmpInt cmpKind = iota
	cmpFloat
	cmpNumeric
	cmpText
	cmpBool
	cmpTime
	cmpNull // one side is a bare NULL: the result is NULL
)

// compareKind picks the comparison domain for types a and b the way
// Postgres' operator resolution does for the built-in types, or fails.
func compareKind(a, b typ) (cmpKind, bool) {
	switch {
	case a == tNull || b == tNull:
		return cmpNull, true
	case a.isInt() && b.isInt():
		return cmpInt, true
	case a.isNum() && b.isNum():
		if a.isFloat() || b.isFloat() {
			return cmpFloat, true
		}
		return cmpNumeric, true
	case a == tText && b == tText:
		return cmpText, true
	case a == tBool && b == tBool:
		return cmpBool, true
	case a == tTimestamptz && b == tTimestamptz, a == tDate && b == tDate:
		return cmpTime, true
	}
	return 0, false
}

// compareValues orders two non-NULL values in domain k: -1, 0 or +1.
// Floats order NaN above every number and equal to itself, as Postgres.
func compareValues(k cmpKind, a, b value) int {
	switch k {
	case cmpInt, cmpBool, cmpTime:
		return cmp3(a.i, b.i)
	case cmpFloat:
		x, y := a.asFloat(), b.asFloat()
		switch {
		case math.IsNaN(x) && math.IsNaN(y):
			return 0
		case math.IsNaN(x):
			return 1
		case math.IsNaN(y):
			return -1
		case x < y:
			return -1
		case x > y:
			return 1
		}
		return 0
	case cmpNumeric:
		return a.rat().Cmp(b.rat())
	case cmpText:
		return strings.Compare(a.s, b.s)
	}
	return 0
}

func cmp3(a, b int64) int {
	switch {
	case a < b:
		return -1
	case a > b:
		return 1
	}
	return 0
}

func cmpResult(op string, c int) bool {
	switch op {
	case "=":
		return c == 0
	case "<>":
		return c != 0
	case "<":
		return c < 0
	case "<=":
		return c <= 0
	case ">":
		return c > 0
	case ">=":
		return c >= 0
	}
	return false
}

type cmpNode struct {
	op   string
	l, r node
	kind cmpKind
}

func (n *cmpNode) typ() typ { return tBool }
func (n *cmpNode) eval(e *env) (value, error) {
	a, err := n.l.eval(e)
	if err != nil {
		return value{}, err
	}
	b, err := n.r.eval(e)
	if err != nil {
		return value{}, err
	}
	if a.null || b.null || n.kind == cmpNull {
		return nullOf(tBool), nil
	}
	return boolVal(cmpResult(n.op, compareValues(n.kind, a, b))), nil
}

type likeNode struct {
	l, r node
	not  bool
}

func (n *likeNode) typ() typ { return tBool }
func (n *likeNode) eval(e *env) (value, error) {
	a, err := n.l.eval(e)
	if err != nil {
		return value{}, err
	}
	b, err := n.r.eval(e)
	if err != nil {
		return value{}, err
	}
	if a.null || b.null {
		return nullOf(tBool), nil
	}
	m, err := likeMatch(a.s, b.s)
	if err != nil {
		return value{}, err
	}
	return boolVal(m != n.not), nil
}

// likeMatch implements LIKE with % and _ over characters and backslash as
// the escape, as Postgres' MatchText.
func likeMatch(s, pat string) (bool, error) {
	// Iterative matcher with one backtrack point for the last %.
	si, pi := 0, 0
	starP, starS := -1, 0
	for si < len(s) {
		if pi < len(pat) {
			c := pat[pi]
			switch {
			case c == '%':
				starP, starS = pi, si
				pi++
				continue
			case c == '_':
				_, n := utf8.DecodeRuneInString(s[si:])
				si += n
				pi++
				continue
			case c == '\\':
				if pi+1 >= len(pat) {
					return false, errorf("22025", "LIKE pattern must not end with escape character")
				}
				_, pn := utf8.DecodeRuneInString(pat[pi+1:])
				_, sn := utf8.DecodeRuneInString(s[si:])
				if pat[pi+1:pi+1+pn] == s[si:si+sn] {
					si += sn
					pi += 1 + pn
					continue
				}
			default:
				_, pn := utf8.DecodeRuneInString(pat[pi:])
				_, sn := utf8.DecodeRuneInString(s[si:])
				if pat[pi:pi+pn] == s[si:si+sn] {
					si += sn
					pi += pn
					continue
				}
			}
		}
		if starP < 0 {
			return false, nil
		}
		_, n := utf8.DecodeRuneInString(s[starS:])
		starS += n
		si = starS
		pi = starP + 1
	}
	for pi < len(pat) && pat[pi] == '%' {
		pi++
	}
	if pi < len(pat) && pat[pi] == '\\' && pi+1 >= len(pat) {
		return false, errorf("22025", "LIKE pattern must not end with escape character")
	}
	return pi == len(pat), nil
}

type andNode struct{ args []node }

func (n *andNode) typ() typ { return tBool }
func (n *andNode) eval(e *env) (value, error) {
	null := false
	for _, a := range n.args {
		v, err := a.eval(e)
		if err != nil {
			return value{}, err
		}
		if v.null {
			null = true
		} else if v.i == 0 {
			return boolVal(false), nil
		}
	}
	if null {
		return nullOf(tBool), nil
	}
	return boolVal(true), nil
}

type orNode struct{ args []node }

func (n *orNode) typ() typ { return tBool }
func (n *orNode) eval(e *env) (value, error) {
	null := false
	for _, a := range n.args {
		v, err := a.eval(e)
		if err != nil {
			return value{}, err
		}
		if v.null {
			null = true
		} else if v.i != 0 {
			return boolVal(true), nil
		}
	}
	if null {
		return nullOf(tBool), nil
	}
	return boolVal(false), nil
}

type notNode struct{ x node }

func (n *notNode) typ() typ { return tBool }
func (n *notNode) eval(e *env) (value, error) {
	v, err := n.x.eval(e)
	if err != nil || v.null {
		return nullOf(tBool), err
	}
	return boolVal(v.i == 0), nil
}

type nullTestNode struct {
	x   node
	not bool
}

func (n *nullTestNode) typ() typ { return tBool }
func (n *nullTestNode) eval(e *env) (value, error) {
	v, err := n.x.eval(e)
	if err != nil {
		return value{}, err
	}
	return boolVal(v.null != n.not), nil
}

type boolTestNode struct {
	x    node
	what string
	not  bool
}

func (n *boolTestNode) typ() typ { return tBool }
func (n *boolTestNode) eval(e *env) (value, error) {
	v, err := n.x.eval(e)
	if err != nil {
		return value{}, err
	}
	var r bool
	switch n.what {
	case "true":
		r = !v.null && v.i != 0
	case "false":
		r = !v.null && v.i == 0
	default:
		r = v.null
	}
	return boolVal(r != n.not), nil
}

type distinctNode struct {
	l, r node
	kind cmpKind
	not  bool
}

func (n *distinctNode) typ() typ { return tBool }
func (n *distinctNode) eval(e *env) (value, error) {
	a, err := n.l.eval(e)
	if err != nil {
		return value{}, err
	}
	b, err := n.r.eval(e)
	if err != nil {
		return value{}, err
	}
	var distinct bool
	switch {
	case a.null || b.null:
		distinct = a.null != b.null
	default:
		distinct = compareValues(n.kind, a, b) != 0
	}
	return boolVal(distinct != n.not), nil
}

// anyNode is l op ANY (array) or l op ALL (array).
type anyNode struct {
	op   string
	any  bool
	l, r node
	kind cmpKind

	// For = ANY and <> ALL of a constant array (IN and NOT IN lists): its
	// non-NULL elements sorted, so that each row costs a binary search
	// instead of a pass over the list.
	sorted  []value
	hasNull bool
}

// index sorts a constant array of = ANY or <> ALL; compareValues is a
// total order for every kind, so equality is found by binary search.
func (n *anyNode) index() {
	arr, ok := isConstNode(n.r)
	if !ok || arr.null || len(arr.arr) < 8 || n.kind == cmpNull ||
		!(n.any && n.op == "=" || !n.any && n.op == "<>") {
		return
	}
	for _, el := range arr.arr {
		if el.null {
			n.hasNull = true
			continue
		}
		n.sorted = append(n.sorted, el)
	}
	sort.Slice(n.sorted, func(i, j int) bool { return compareValues(n.kind, n.sorted[i], n.sorted[j]) < 0 })
}

func (n *anyNode) typ() typ { return tBool }
func (n *anyNode) eval(e *env) (value, error) {
	a, err := n.l.eval(e)
	if err != nil {
		return value{}, err
	}
	if n.sorted != nil || n.hasNull {
		if a.null {
			return nullOf(tBool), nil
		}
		i := sort.Search(len(n.sorted), func(i int) bool { return compareValues(n.kind, n.sorted[i], a) >= 0 })
		switch {
		case i < len(n.sorted) && compareValues(n.kind, n.sorted[i], a) == 0:
			return boolVal(n.any), nil // found: = ANY is true, <> ALL false
		case n.hasNull:
			return nullOf(tBool), nil
		}
		return boolVal(!n.any), nil
	}
	arr, err := n.r.eval(e)
	if err != nil {
		return value{}, err
	}
	if arr.null {
		return nullOf(tBool), nil
	}
	if len(arr.arr) == 0 {
		return boolVal(!n.any), nil
	}
	if a.null || n.kind == cmpNull {
		return nullOf(tBool), nil
	}
	null := false
	for _, el := range arr.arr {
		if el.null {
			null = true
			continue
		}
		r := cmpResult(n.op, compareValues(n.kind, a, el))
		if n.any && r {
			return boolVal(true), nil
		}
		if !n.any && !r {
			return boolVal(false), nil
		}
	}
	if null {
		return nullOf(tBool), nil
	}
	return boolVal(!n.any), nil
}

type arrayNode struct {
	elems []node
	t     typ
}

func (n *arrayNode) typ() typ { return n.t }
func (n *arrayNode) eval(e *env) (value, error) {
	out := value{t: n.t, array: true, arr: make([]value, len(n.elems))}
	for i, el := range n.elems {
		v, err := el.eval(e)
		if err != nil {
			return value{}, err
		}
		out.arr[i] = v
	}
	return out, nil
}

type caseNode struct {
	arg   node
	kind  cmpKind
	whens []node
	thens []node
	els   node
	t     typ
}

func (n *caseNode) typ() typ { return n.t }
func (n *caseNode) eval(e *env) (value, error) {
	var arg value
	if n.arg != nil {
		v, err := n.arg.eval(e)
		if err != nil {
			return value{}, err
		}
		arg = v
	}
	for i, w := range n.whens {
		c, err := w.eval(e)
		if err != nil {
			return value{}, err
		}
		hit := false
		if n.arg != nil {
			hit = !arg.null && !c.null && compareValues(n.kind, arg, c) == 0
		} else {
			hit = !c.null && c.i != 0
		}
		if hit {
			return n.thens[i].eval(e)
		}
	}
	if n.els == nil {
		return nullOf(n.t), nil
	}
	return n.els.eval(e)
}

// arithNode is + - * / % on numbers with Postgres' overflow and division
// checks; l is nil for unary minus.
type arithNode struct {
	op   string
	l, r node
	t    typ
}

func (n *arithNode) typ() typ { return n.t }
func (n *arithNode) eval(e *env) (value, error) {
	var a value
	if n.l != nil {
		v, err := n.l.eval(e)
		if err != nil {
			return value{}, err
		}
		a = v
	}
	b, err := n.r.eval(e)
	if err != nil {
		return value{}, err
	}
	if n.l == nil {
		if b.null {
			return nullOf(n.t), nil
		}
		return negate(n.t, b)
	}
	if a.null || b.null {
		return nullOf(n.t), nil
	}
	return arith(n.t, n.op, a, b)
}

// arith applies op in result type t.
func arith(t typ, op string, a, b value) (value, error) {
	switch {
	case a.t == tDate || b.t == tDate:
		// date - date is integer days; date +/- integer is a date.
		var r int64
		switch {
		case a.t == tDate && b.t == tDate:
			r = a.i - b.i
		case op == "+":
			r = a.i + b.i
		default:
			r = a.i - b.i
		}
		// Postgres' date range, Julian days 0 to 2147483494 (4713 BC to 5874897 AD).
		if r < -2440588 || r > 2147483494-2440588 {
			return value{}, errorf(codeOutOfRange, "date out of range")
		}
		return value{t: t, i: r}, nil
	case t.isInt():
		x, y := a.i, b.i
		var r int64
		switch op {
		case "+":
			r = x + y
			if (x > 0 && y > 0 && r < 0) || (x < 0 && y < 0 && r >= 0) {
				return value{}, intOverflow(t)
			}
		case "-":
			r = x - y
			if (x >= 0 && y < 0 && r < 0) || (x < 0 && y > 0 && r >= 0) {
				return value{}, intOverflow(t)
			}
		case "*":
			r = x * y
			if x != 0 && (r/x != y || (x == -1 && y == math.MinInt64) || (y == -1 && x == math.MinInt64)) {
				return value{}, intOverflow(t)
			}
		case "/", "%":
			if y == 0 {
				return value{}, errorf(codeDivisionByZero, "division by zero")
			}
			if y == -1 {
				if op == "%" {
					return value{t: t, i: 0}, nil
				}
				if x == math.MinInt64 {
					return value{}, intOverflow(t)
				}
				r = -x
			} else if op == "/" {
				r = x / y
			} else {
				r = x % y
			}
		}
		lo, hi := intRange(t)
		if r < lo || r > hi {
			return value{}, intOverflow(t)
		}
		return value{t: t, i: r}, nil
	case t.isFloat():
		x, y := a.asFloat(), b.asFloat()
		var r float64
		switch op {
		case "+":
			r = x + y
		case "-":
			r = x - y
		case "*":
			r = x * y
			if r == 0 && x != 0 && y != 0 {
				return value{}, errorf(codeOutOfRange, "value out of range: underflow")
			}
		case "/":
			if y == 0 {
				return value{}, errorf(codeDivisionByZero, "division by zero")
			}
			r = x / y
			if r == 0 && x != 0 && !math.IsInf(y, 0) {
				return value{}, errorf(codeOutOfRange, "value out of range: underflow")
			}
		default:
			return value{}, notSupported("operator %s is not supported for %s", op, t)
		}
		if t == tFloat4 {
			r = float64(float32(r))
		}
		if math.IsInf(r, 0) && !math.IsInf(x, 0) && !math.IsInf(y, 0) {
			return value{}, errorf(codeOutOfRange, "value out of range: overflow")
		}
		return value{t: t, f: r}, nil
	case t == tNumeric:
		x, y := a.rat(), b.rat()
		sx, sy := numericScale(a), numericScale(b)
		switch op {
		case "+":
			return numericVal(new(big.Rat).Add(x, y), max(sx, sy)), nil
		case "-":
			return numericVal(new(big.Rat).Sub(x, y), max(sx, sy)), nil
		case "*":
			return numericVal(new(big.Rat).Mul(x, y), sx+sy), nil
		case "/":
			if y.Sign() == 0 {
				return value{}, errorf(codeDivisionByZero, "division by zero")
			}
			scale := divScale(numericVal(x, sx), numericVal(y, sy))
			return numericVal(roundRat(new(big.Rat).Quo(x, y), scale), scale), nil
		}
		return value{}, notSupported("operator %s is not supported for numeric", op)
	}
	return value{}, notSupported("arithmetic on %s is not supported", t)
}

// negate is unary minus in type t.
func negate(t typ, b value) (value, error) {
	switch {
	case t.isInt():
		lo, _ := intRange(t)
		if b.i == lo {
			return value{}, intOverflow(t)
		}
		return value{t: t, i: -b.i}, nil
	case t.isFloat():
		return value{t: t, f: -b.asFloat()}, nil
	case t == tNumeric:
		return numericVal(new(big.Rat).Neg(b.rat()), numericScale(b)), nil
	}
	return value{}, notSupported("unary minus on %s is not supported", t)
}

func intOverflow(t typ) error { return errorf(codeOutOfRange, "%s out of range", t) }

func numericScale(v value) int {
	if v.t == tNumeric {
		return int(v.i)
	}
	return 0
}

// divScale is the result scale of numeric division, Postgres'
// select_div_scale: at least 16 significant digits and no less than either
// input's display scale, for the quotient's estimated weight in base-10000
// digits.
func divScale(a, b value) int {
	w1, d1 := numericWeight(a)
	w2, d2 := numericWeight(b)
	qweight := w1 - w2
	if d1 <= d2 {
		qweight--
	}
	const minSigDigits, decDigits = 16, 4
	rscale := minSigDigits - qweight*decDigits
	rscale = max(rscale, int(a.i), int(b.i), 0)
	return min(rscale, 1000)
}

// numericWeight returns the weight (power of 10000 of the first base-10000
// digit) and that first non-zero digit of a numeric; 0, 0 for zero.
func numericWeight(v value) (weight int, first int) {
	s := v.n.FloatString(int(v.i))
	s = strings.TrimPrefix(s, "-")
	intPart, frac, _ := strings.Cut(s, ".")
	intPart = strings.TrimLeft(intPart, "0")
	if intPart != "" {
		// Group the integer digits in fours from the point.
		lead := len(intPart) % 4
		if lead == 0 {
			lead = 4
		}
		d, _ := strconv.Atoi(intPart[:lead])
		return (len(intPart) - 1) / 4, d
	}
	// Pad the fraction to whole groups of four.
	for len(frac)%4 != 0 {
		frac += "0"
	}
	for g := 0; g*4 < len(frac); g++ {
		d, _ := strconv.Atoi(frac[g*4 : g*4+4])
		if d != 0 {
			return -(g + 1), d
		}
	}
	return 0, 0
}
