package sqlwire

import (
	"math"
	"math/big"
	"strconv"
	"strings"
	"time"
	"unicode/utf8"
)

// inputValue reads text as a value of type t, as the type's input function
// does in Postgres (int4in, float8in, numeric_in, boolin, timestamptz_in).
// Timestamps without an offset are in loc, the session's TimeZone.
func inputValue(s string, t typ, loc *time.Location) (value, error) {
	switch t {
	case tText, tUnknown, tNull:
		if !utf8.ValidString(s) {
			return value{}, errorf("22021", "invalid byte sequence for encoding \"UTF8\"")
		}
		return textVal(s), nil
	case tBool:
		switch strings.ToLower(strings.TrimSpace(s)) {
		case "t", "tr", "tru", "true", "y", "ye", "yes", "on", "1":
			return boolVal(true), nil
		case "f", "fa", "fal", "fals", "false", "n", "no", "of", "off", "0":
			return boolVal(false), nil
		}
		return value{}, errorf(codeInvalidText, "invalid input syntax for type boolean: %q", s)
	case tInt2, tInt4, tInt8:
		return inputInt(s, t)
	case tFloat4, tFloat8:
		return inputFloat(s, t)
	case tNumeric:
		v, err := parseNumeric(s)
		if err != nil {
			if l := strings.ToLower(strings.TrimSpace(s)); l == "nan" || strings.Contains(l, "inf") {
				return value{}, notSupported("numeric %s is not supported", s)
			}
			return value{}, err
		}
		return v, nil
	case tTimestamptz:
		return inputTimestamptz(s, loc)
	case tDate:
		v, err := inputTimestamptz(s, time.UTC)
		if err != nil || v.i%(86400*1_000_000) != 0 || strings.ContainsAny(strings.TrimSpace(s), " T:+") {
			return value{}, errorf(codeInvalidDatetime, "invalid input syntax for type date: %q", s).
				withHint("write an ISO date such as '2025-07-01'")
		}
		return value{t: tDate, i: v.i / (86400 * 1_000_000)}, nil
	}
	return value{}, errorf(codeInternal, "no input function for %s", t)
}

func intRange(t typ) (lo, hi int64) {
	switch t {
	case tInt2:
		return math.MinInt16, math.MaxInt16
	case tInt4:
		return math.MinInt32, math.MaxInt32
	}
	return math.MinInt64, math.MaxInt64
}

func inputInt(s string, t typ) (value, error) {
	trim := strings.TrimSpace(s)
	body := strings.TrimPrefix(strings.TrimPrefix(trim, "+"), "-")
	if body == "" || strings.Trim(body, "0123456789") != "" || strings.HasPrefix(trim, "+-") {
		return value{}, errorf(codeInvalidText, "invalid input syntax for type %s: %q", t, s)
	}
	n, err := strconv.ParseInt(strings.TrimPrefix(trim, "+"), 10, 64)
	lo, hi := intRange(t)
	if err != nil || n < lo || n > hi {
		return value{}, errorf(codeOutOfRange, "value %q is out of range for type %s", s, t)
	}
	return value{t: t, i: n}, nil
}

func inputFloat(s string, t typ) (value, error) {
	trim := strings.TrimSpace(s)
	var f float64
	switch strings.ToLower(trim) {
	case "nan":
		f = math.NaN()
	case "infinity", "+infinity", "inf", "+inf":
		f = math.Inf(1)
	case "-infinity", "-inf":
		f = math.Inf(-1)
	default:
		if !isDecimal(trim) {
			return value{}, errorf(codeInvalidText, "invalid input syntax for type %s: %q", t, s)
		}
		bits := 64
		if t == tFloat4 {
			bits = 32
		}
		var err error
		f, err = strconv.ParseFloat(trim, bits)
		if err != nil {
			return value{}, errorf(codeOutOfRange, "%q is out of range for type %s", s, t)
		}
	}
	return value{t: t, f: f}, nil
}

// inputTimestamptz reads the ISO forms Postgres prints and accepts:
// YYYY-MM-DD, YYYY-MM-DD HH:MM[:SS[.frac]] with T or space, and an optional
// zone Z, UTC, GMT or +HH[:MM[:SS]] / -HH... ; infinity and -infinity.
func inputTimestamptz(s string, loc *time.Location) (value, error) {
	bad := func() (value, error) {
		return value{}, errorf(codeInvalidDatetime, "invalid input syntax for type timestamp with time zone: %q", s).
			withHint("write an ISO timestamp such as '2024-01-05 00:00:00+00'")
	}
	str := strings.TrimSpace(s)
	switch strings.ToLower(str) {
	case "infinity", "+infinity":
		return tsVal(math.MaxInt64), nil
	case "-infinity":
		return tsVal(math.MinInt64), nil
	}
	num := func(k int) (int, bool) {
		if len(str) < k {
			return 0, false
		}
		n := 0
		for i := 0; i < k; i++ {
			c := str[i]
			if c < '0' || c > '9' {
				return 0, false
			}
			n = n*10 + int(c-'0')
		}
		str = str[k:]
		return n, true
	}
	lit := func(c byte) bool {
		if len(str) > 0 && str[0] == c {
			str = str[1:]
			return true
		}
		return false
	}
	year, ok := num(4)
	if !ok || !lit('-') {
		return bad()
	}
	month, ok := num(2)
	if !ok || !lit('-') {
		return bad()
	}
	day, ok := num(2)
	if !ok {
		return bad()
	}
	var hour, minute, sec, nanos int
	if lit(' ') || lit('T') || lit('t') {
		str = strings.TrimLeft(str, " ")
		if hour, ok = num(2); !ok || !lit(':') {
			return bad()
		}
		if minute, ok = num(2); !ok {
			return bad()
		}
		if lit(':') {
			if sec, ok = num(2); !ok {
				return bad()
			}
			if lit('.') {
				digits := 0
				for len(str) > 0 && str[0] >= '0' && str[0] <= '9' {
					if digits < 9 {
						nanos = nanos*10 + int(str[0]-'0')
					}
					digits++
					str = str[1:]
				}
				if digits == 0 {
					return bad()
				}
				for d := digits; d < 9; d++ {
					nanos *= 10
				}
				// Postgres keeps microseconds, rounding half away from zero.
				nanos = (nanos + 500) / 1000 * 1000
			}
		}
	}
	str = strings.TrimLeft(str, " ")
	zone := loc
	switch {
	case str == "":
	case strings.EqualFold(str, "z"), strings.EqualFold(str, "utc"), strings.EqualFold(str, "gmt"):
		zone = time.UTC
	case str[0] == '+' || str[0] == '-':
		sign := 1
		if str[0] == '-' {
			sign = -1
		}
		str = str[1:]
		oh, ok := num(2)
		if !ok {
			return bad()
		}
		var om, os int
		if lit(':') {
			if om, ok = num(2); !ok {
				return bad()
			}
			if lit(':') {
				if os, ok = num(2); !ok {
					return bad()
				}
			}
		} else if len(str) == 4 {
			om, _ = num(2)
			os, _ = num(2)
		} else if len(str) == 2 {
			om, _ = num(2)
		}
		if str != "" || oh > 15 || om > 59 || os > 59 {
			return bad()
		}
		zone = time.FixedZone("", sign*(oh*3600+om*60+os))
	default:
		return bad()
	}
	if month < 1 || month > 12 || day < 1 || day > 31 || hour > 24 || minute > 59 || sec > 60 ||
		hour == 24 && (minute != 0 || sec != 0 || nanos != 0) {
		return value{}, errorf(codeOutOfRange, "date/time field value out of range: %q", s)
	}
	t := time.Date(year, time.Month(month), day, hour, minute, sec, nanos, zone)
	if t.Day() != day && hour != 24 {
		return value{}, errorf(codeOutOfRange, "date/time field value out of range: %q", s)
	}
	return timeVal(t), nil
}

// parseArrayLiteral reads a one-dimensional array literal such as
// {0.9,0.95} or {"a b",NULL} with elements of type elem.
func parseArrayLiteral(s string, elem typ, loc *time.Location) (value, error) {
	bad := func(why string) (value, error) {
		return value{}, errorf(codeInvalidText, "malformed array literal: %q", s).withDetail("%s", why)
	}
	str := strings.TrimSpace(s)
	if len(str) < 2 || str[0] != '{' || str[len(str)-1] != '}' {
		return bad("array value must start with \"{\" and end with \"}\"")
	}
	body := str[1 : len(str)-1]
	out := value{t: elem, array: true}
	if strings.TrimSpace(body) == "" {
		return out, nil
	}
	i := 0
	for {
		for i < len(body) && body[i] == ' ' {
			i++
		}
		var b strings.Builder
		quoted := false
		if i < len(body) && body[i] == '"' {
			quoted = true
			i++
			for {
				if i >= len(body) {
					return bad("unterminated quoted element")
				}
				c := body[i]
				if c == '\\' && i+1 < len(body) {
					b.WriteByte(body[i+1])
					i += 2
					continue
				}
				if c == '"' {
					i++
					break
				}
				b.WriteByte(c)
				i++
			}
			for i < len(body) && body[i] == ' ' {
				i++
			}
		} else {
			for i < len(body) && body[i] != ',' {
				c := body[i]
				if c == '{' || c == '}' || c == '"' {
					return bad("multidimensional arrays and unquoted special characters are not supported")
				}
				if c == '\\' && i+1 < len(body) {
					b.WriteByte(body[i+1])
					i += 2
					continue
				}
				b.WriteByte(c)
				i++
			}
		}
		elemText := b.String()
		if !quoted {
			elemText = strings.TrimRight(elemText, " ")
		}
		if !quoted && strings.EqualFold(elemText, "null") {
			out.arr = append(out.arr, nullOf(elem))
		} else {
			if !quoted && elemText == "" {
				return bad("unexpected \",\" character")
			}
			v, err := inputValue(elemText, elem, loc)
			if err != nil {
				return value{}, err
			}
			out.arr = append(out.arr, v)
		}
		if i >= len(body) {
			return out, nil
		}
		if body[i] != ',' {
			return bad("junk after array element")
		}
		i++
	}
}

// castValue converts v to type to (explicit cast semantics, as the ::
// operator in Postgres). prec and scale are numeric's typmod, -1 if none.
func castValue(v value, to typ, prec, scale int, loc *time.Location) (value, error) {
	if v.null {
		return nullOf(to), nil
	}
	if v.array {
		return value{}, errorf(codeCannotCoerce, "cannot cast type %s[] to %s", v.t, to)
	}
	from := v.t
	if from == tUnknown || from == tText {
		if to == tText {
			return textVal(v.s), nil
		}
		r, err := inputValue(v.s, to, loc)
		if err != nil {
			return value{}, err
		}
		return applyNumericTypmod(r, prec, scale)
	}
	if from == to && to != tNumeric {
		return v, nil
	}
	switch {
	case to == tText:
		return textVal(string(appendText(nil, v, 1))), nil
	case from.isInt() && to.isInt():
		lo, hi := intRange(to)
		if v.i < lo || v.i > hi {
			return value{}, errorf(codeOutOfRange, "%s out of range", to)
		}
		return value{t: to, i: v.i}, nil
	case from.isInt() && to.isFloat():
		f := float64(v.i)
		if to == tFloat4 {
			f = float64(float32(v.i))
		}
		return value{t: to, f: f}, nil
	case from.isInt() && to == tNumeric:
		return applyNumericTypmod(numericVal(new(big.Rat).SetInt64(v.i), 0), prec, scale)
	case from.isFloat() && to.isInt():
		if math.IsNaN(v.f) || math.IsInf(v.f, 0) {
			return value{}, errorf(codeOutOfRange, "%s out of range", to)
		}
		r := math.RoundToEven(v.f) // Postgres uses rint()
		lo, hi := intRange(to)
		if r < float64(lo) || r >= -float64(lo) || int64(r) > hi {
			return value{}, errorf(codeOutOfRange, "%s out of range", to)
		}
		return value{t: to, i: int64(r)}, nil
	case from.isFloat() && to.isFloat():
		if to == tFloat4 {
			f := float32(v.f)
			if math.IsInf(float64(f), 0) && !math.IsInf(v.f, 0) {
				return value{}, errorf(codeOutOfRange, "value out of range: overflow")
			}
			if f == 0 && v.f != 0 {
				return value{}, errorf(codeOutOfRange, "value out of range: underflow")
			}
			return value{t: to, f: float64(f)}, nil
		}
		return value{t: to, f: v.f}, nil
	case from.isFloat() && to == tNumeric:
		if math.IsNaN(v.f) || math.IsInf(v.f, 0) {
			return value{}, notSupported("cannot convert %v to numeric", v.f)
		}
		// float8_numeric prints with DBL_DIG (15) significant digits.
		digits := 15
		if from == tFloat4 {
			digits = 6
		}
		n, err := parseNumeric(strconv.FormatFloat(v.f, 'g', digits, 64))
		if err != nil {
			return value{}, err
		}
		return applyNumericTypmod(n, prec, scale)
	case from == tNumeric && to.isInt():
		r := roundRat(v.n, 0)
		if !r.IsInt() {
			return value{}, errorf(codeInternal, "rounding failed")
		}
		n := r.Num()
		lo, hi := intRange(to)
		if !n.IsInt64() || n.Int64() < lo || n.Int64() > hi {
			return value{}, errorf(codeOutOfRange, "%s out of range", to)
		}
		return value{t: to, i: n.Int64()}, nil
	case from == tNumeric && to.isFloat():
		bits := 64
		if to == tFloat4 {
			bits = 32
		}
		f, err := strconv.ParseFloat(v.n.FloatString(int(v.i)), bits)
		if err != nil {
			return value{}, errorf(codeOutOfRange, "value out of range: overflow")
		}
		return value{t: to, f: f}, nil
	case from == tNumeric && to == tNumeric:
		return applyNumericTypmod(v, prec, scale)
	case from == tDate && to == tTimestamptz:
		// Midnight of the date in the session's TimeZone, as date_timestamptz.
		y, m, d := time.Unix(v.i*86400, 0).UTC().Date()
		return timeVal(time.Date(y, m, d, 0, 0, 0, 0, loc)), nil
	case from == tTimestamptz && to == tDate:
		t := time.UnixMicro(v.i).In(loc)
		y, m, d := t.Date()
		return value{t: tDate, i: time.Date(y, m, d, 0, 0, 0, 0, time.UTC).Unix() / 86400}, nil
	case from == tBool && to == tInt4:
		return int4Val(v.i), nil
	case from == tInt4 && to == tBool:
		return boolVal(v.i != 0), nil
	}
	return value{}, errorf(codeCannotCoerce, "cannot cast type %s to %s", from, to)
}

// applyNumericTypmod rounds a numeric to numeric(prec, scale), half away
// from zero as Postgres does, and checks the precision.
func applyNumericTypmod(v value, prec, scale int) (value, error) {
	if prec < 0 || v.t != tNumeric {
		return v, nil
	}
	r := roundRat(v.n, scale)
	limit := new(big.Rat).SetFrac(new(big.Int).Exp(big.NewInt(10), big.NewInt(int64(prec-scale)), nil), big.NewInt(1))
	if new(big.Rat).Abs(r).Cmp(limit) >= 0 {
		return value{}, errorf(codeOutOfRange, "numeric field overflow").
			withDetail("A field with precision %d, scale %d must round to an absolute value less than 10^%d.", prec, scale, prec-scale)
	}
	return numericVal(r, scale), nil
}

// roundRat rounds r to scale decimals, halves away from zero.
func roundRat(r *big.Rat, scale int) *big.Rat {
	out, _ := new(big.Rat).SetString(r.FloatString(scale))
	return out
}
