package sqlwire

import (
	"fmt"
	"math"
	"math/big"
	"strconv"
	"strings"
	"time"
)

// typ is a SQL type the endpoint knows. Every value a query sees or returns
// has one of these; anything else in a statement is refused.
type typ uint8

const (
	tUnknown     typ = iota // an untyped string literal, resolved by context
	tText                   // text, varchar and char are all text here
	tBool                   // boolean
	tInt2                   // smallint, only from casts in queries
	tInt4                   // integer
	tInt8                   // bigint
	tFloat4                 // real, only from casts in queries
	tFloat8                 // double precision
	tNumeric                // numeric: literals, sum(bigint), avg(integer)
	tTimestamptz            // timestamp with time zone
	tDate                   // date: days since 1970-01-01, only from queries
	tNull                   // the type of a bare NULL
)

// Type OIDs from the Postgres catalog (src/include/catalog/pg_type.dat).
var typeOID = map[typ]uint32{
	tUnknown: 705, tText: 25, tBool: 16, tInt2: 21, tInt4: 23, tInt8: 20,
	tFloat4: 700, tFloat8: 701, tNumeric: 1700, tTimestamptz: 1184, tDate: 1082, tNull: 25,
}

// typeLen is pg_type.typlen for RowDescription.
var typeLen = map[typ]int16{
	tUnknown: -2, tText: -1, tBool: 1, tInt2: 2, tInt4: 4, tInt8: 8,
	tFloat4: 4, tFloat8: 8, tNumeric: -1, tTimestamptz: 8, tDate: 4, tNull: -1,
}

func (t typ) String() string {
	switch t {
	case tUnknown:
		return "unknown"
	case tText:
		return "text"
	case tBool:
		return "boolean"
	case tInt2:
		return "smallint"
	case tInt4:
		return "integer"
	case tInt8:
		return "bigint"
	case tFloat4:
		return "real"
	case tFloat8:
		return "double precision"
	case tNumeric:
		return "numeric"
	case tTimestamptz:
		return "timestamp with time zone"
	case tDate:
		return "date"
	case tNull:
		return "unknown"
	}
	return fmt.Sprintf("type(%d)", t)
}

func (t typ) isInt() bool   { return t == tInt2 || t == tInt4 || t == tInt8 }
func (t typ) isFloat() bool { return t == tFloat4 || t == tFloat8 }
func (t typ) isNum() bool   { return t.isInt() || t.isFloat() || t == tNumeric }

// typeNames maps the type names a query may spell (as format_type prints
// them, and the usual aliases) to types. Array types add "[]".
var typeNames = map[string]typ{
	"text": tText, "character varying": tText, "varchar": tText, "character": tText,
	"char": tText, "bpchar": tText, "name": tText,
	"boolean": tBool, "bool": tBool,
	"smallint": tInt2, "int2": tInt2,
	"integer": tInt4, "int": tInt4, "int4": tInt4,
	"bigint": tInt8, "int8": tInt8,
	"real": tFloat4, "float4": tFloat4,
	"double precision": tFloat8, "float8": tFloat8, "float": tFloat8,
	"numeric": tNumeric, "decimal": tNumeric,
	"timestamp with time zone": tTimestamptz, "timestamptz": tTimestamptz,
	"date": tDate,
}

// value is one SQL datum. Which field holds it depends on t: i for
// integers, booleans (0/1) and timestamptz (microseconds since the Unix
// epoch, UTC), f for floats, s for text and untyped literals, n for numeric
// (with its display scale in i), arr for arrays (t is the element type).
type value struct {
	t     typ
	null  bool
	array bool
	i     int64
	f     float64
	s     string
	n     *big.Rat
	arr   []value
}

func nullOf(t typ) value        { return value{t: t, null: true} }
func textVal(s string) value    { return value{t: tText, s: s} }
func int4Val(i int64) value     { return value{t: tInt4, i: i} }
func int8Val(i int64) value     { return value{t: tInt8, i: i} }
func boolVal(b bool) value      { return value{t: tBool, i: b2i(b)} }
func float8Val(f float64) value { return value{t: tFloat8, f: f} }
func tsVal(micros int64) value  { return value{t: tTimestamptz, i: micros} }
func numericVal(r *big.Rat, scale int) value {
	return value{t: tNumeric, n: r, i: int64(scale)}
}

// float8OrNull maps NaN, which the estimator uses for "undefined", to NULL.
func float8OrNull(f float64) value {
	if math.IsNaN(f) {
		return nullOf(tFloat8)
	}
	return float8Val(f)
}

func timeVal(t time.Time) value { return tsVal(t.UnixMicro()) }

func b2i(b bool) int64 {
	if b {
		return 1
	}
	return 0
}

// rat returns the exact rational value of a numeric-kind value.
func (v value) rat() *big.Rat {
	switch {
	case v.t.isInt():
		return new(big.Rat).SetInt64(v.i)
	case v.t == tNumeric:
		return v.n
	case v.t.isFloat():
		r, _ := new(big.Rat).SetString(strconv.FormatFloat(v.f, 'g', -1, 64))
		return r
	}
	panic("sqlwire: rat of a non-numeric value")
}

// asFloat returns a numeric value as float8, rounding a numeric the way
// Postgres' numeric-to-float8 cast does (through its decimal text).
func (v value) asFloat() float64 {
	switch {
	case v.t.isInt():
		return float64(v.i)
	case v.t.isFloat():
		return v.f
	case v.t == tNumeric:
		f, _ := strconv.ParseFloat(v.n.FloatString(numericTextScale(v)), 64)
		return f
	}
	panic("sqlwire: asFloat of a non-numeric value")
}

// numericTextScale is the number of decimals to print a numeric with: its
// display scale, or enough for a literal that had an exponent.
func numericTextScale(v value) int { return int(v.i) }

// appendText appends the value in Postgres' text output format, as the
// input function of the column type on the local side reads it back. The
// caller has handled NULL. Floats print in the shortest form that reads
// back to the same bits (Postgres 12+ with extra_float_digits > 0), or with
// 15 + extra_float_digits significant digits when that is 0 or less.
func appendText(dst []byte, v value, floatDigits int) []byte {
	if v.array {
		dst = append(dst, '{')
		for i, e := range v.arr {
			if i > 0 {
				dst = append(dst, ',')
			}
			if e.null {
				dst = append(dst, "NULL"...)
				continue
			}
			s := string(appendText(nil, e, floatDigits))
			if e.t == tText || s == "" {
				dst = strconv.AppendQuote(dst, s)
			} else {
				dst = append(dst, s...)
			}
		}
		return append(dst, '}')
	}
	switch v.t {
	case tText, tUnknown:
		return append(dst, v.s...)
	case tBool:
		if v.i != 0 {
			return append(dst, 't')
		}
		return append(dst, 'f')
	case tInt2, tInt4, tInt8:
		return strconv.AppendInt(dst, v.i, 10)
	case tFloat4:
		return appendFloat(dst, v.f, 32, floatDigits)
	case tFloat8:
		return appendFloat(dst, v.f, 64, floatDigits)
	case tNumeric:
		return append(dst, v.n.FloatString(int(v.i))...)
	case tTimestamptz:
		return appendTimestamptz(dst, v.i)
	case tDate:
		return time.Unix(v.i*86400, 0).UTC().AppendFormat(dst, "2006-01-02")
	}
	panic("sqlwire: text output of an unknown type")
}

func appendFloat(dst []byte, f float64, bits, floatDigits int) []byte {
	switch {
	case math.IsInf(f, 1):
		return append(dst, "Infinity"...)
	case math.IsInf(f, -1):
		return append(dst, "-Infinity"...)
	case math.IsNaN(f):
		return append(dst, "NaN"...)
	}
	if floatDigits > 0 {
		return strconv.AppendFloat(dst, f, 'g', -1, bits)
	}
	digits := 15 + floatDigits
	if bits == 32 {
		digits = 6 + floatDigits
	}
	if digits < 1 {
		digits = 1
	}
	return strconv.AppendFloat(dst, f, 'g', digits, bits)
}

// appendTimestamptz prints microseconds since the epoch as ISO text in UTC
// with an explicit offset, which any local TimeZone reads back exactly.
func appendTimestamptz(dst []byte, micros int64) []byte {
	switch micros {
	case math.MaxInt64:
		return append(dst, "infinity"...)
	case math.MinInt64:
		return append(dst, "-infinity"...)
	}
	t := time.UnixMicro(micros).UTC()
	dst = t.AppendFormat(dst, "2006-01-02 15:04:05")
	if us := t.Nanosecond() / 1000; us != 0 {
		frac := strconv.Itoa(1000000 + us)[1:]
		dst = append(dst, '.')
		dst = append(dst, strings.TrimRight(frac, "0")...)
	}
	return append(dst, "+00"...)
}
