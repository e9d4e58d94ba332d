package calendar

import (
	"errors"
	"fmt"
	"math"
	"strconv"
	"strings"
)

// Width is a bucket width as Postgres stores an interval: months, days and
// microseconds. A valid width has exactly one of the three non-zero and
// positive, and a time width is a whole number of seconds, at least one.
//
// The three kinds mean different things: months follow the calendar (a
// month has 28 to 31 days), days follow the local calendar (a day across a
// DST change has 23 or 25 hours), and microseconds are a fixed length of
// absolute time.
type Width struct {
	Months int
	Days   int
	Micros int64
}

const (
	microsPerSecond = 1_000_000
	microsPerMinute = 60 * microsPerSecond
	microsPerHour   = 60 * microsPerMinute
	microsPerDay    = 24 * microsPerHour
)

// String returns the width as Postgres prints an interval with its default
// IntervalStyle (postgres): "1 day", "7 days", "3 mons", "1 year",
// "00:15:00", "36:00:00". Postgres reads the text back as the same
// interval, and so does ParseWidth for a valid width.
func (w Width) String() string {
	// The fields and signs follow EncodeInterval in Postgres' datetime.c
	// (INTSTYLE_POSTGRES): years and months split with truncating
	// division, each part signed, a "+" on a positive part that follows a
	// negative one.
	var b strings.Builder
	zero, before := true, false
	part := func(v int64, unit string) {
		if v == 0 {
			return
		}
		if !zero {
			b.WriteByte(' ')
		}
		if before && v > 0 {
			b.WriteByte('+')
		}
		b.WriteString(strconv.FormatInt(v, 10))
		b.WriteByte(' ')
		b.WriteString(unit)
		if v != 1 {
			b.WriteByte('s')
		}
		before, zero = v < 0, false
	}
	part(int64(w.Months/12), "year")
	part(int64(w.Months%12), "mon")
	part(int64(w.Days), "day")
	t := w.Micros
	hour := t / microsPerHour
	t -= hour * microsPerHour
	minute := t / microsPerMinute
	t -= minute * microsPerMinute
	sec := t / microsPerSecond
	frac := t - sec*microsPerSecond
	if zero || hour != 0 || minute != 0 || sec != 0 || frac != 0 {
		if !zero {
			b.WriteByte(' ')
		}
		switch {
		case hour < 0 || minute < 0 || sec < 0 || frac < 0:
			b.WriteByte('-')
		case before:
			b.WriteByte('+')
		}
		fmt.Fprintf(&b, "%02d:%02d:%02d", abs64(hour), abs64(minute), abs64(sec))
		if frac != 0 {
			b.WriteString(strings.TrimRight(fmt.Sprintf(".%06d", abs64(frac)), "0"))
		}
	}
	return b.String()
}

// Validate reports whether w is a usable bucket width. The error says what
// to write instead, and reads the same as the one sidetrend.bucket_check
// raises in SQL for the same interval.
func (w Width) Validate() error {
	return w.validate(w.String())
}

// validate checks w and names it label in the error.
func (w Width) validate(label string) error {
	kinds := 0
	for _, nonzero := range []bool{w.Months != 0, w.Days != 0, w.Micros != 0} {
		if nonzero {
			kinds++
		}
	}
	switch {
	case kinds == 0:
		return fmt.Errorf("bucket width '%s' is zero: use a positive interval such as '1 day'", label)
	case kinds > 1 && w.Months != 0:
		return fmt.Errorf("bucket width '%s' mixes months with days or hours: months have no fixed length, "+
			"so write whole months such as '1 mon' or '3 mons', or days or hours alone", label)
	case kinds > 1:
		total := int64(w.Days)*microsPerDay + w.Micros
		fixed := "'6 hours'"
		switch {
		case total > 0 && total%microsPerHour == 0:
			fixed = fmt.Sprintf("'%d hours'", total/microsPerHour)
		case total > 0 && total%microsPerMinute == 0:
			fixed = fmt.Sprintf("'%d minutes'", total/microsPerMinute)
		case total > 0 && total%microsPerSecond == 0:
			fixed = fmt.Sprintf("'%d seconds'", total/microsPerSecond)
		}
		return fmt.Errorf("bucket width '%s' mixes days with hours: a day follows the local calendar "+
			"(23 or 25 hours across a DST change), so write whole days such as '1 day' or a fixed length such as %s",
			label, fixed)
	case w.Months < 0 || w.Days < 0 || w.Micros < 0:
		return fmt.Errorf("bucket width '%s' is negative: use a positive interval such as '%s'",
			label, Width{-w.Months, -w.Days, -w.Micros})
	case w.Micros > 0 && w.Micros < microsPerSecond:
		return fmt.Errorf("bucket width '%s' is shorter than one second: use at least '00:00:01'", label)
	case w.Micros%microsPerSecond != 0:
		return fmt.Errorf("bucket width '%s' is not a whole number of seconds: round it, for example to '%s'",
			label, Width{Micros: w.Micros - w.Micros%microsPerSecond})
	}
	return nil
}

// ParseWidth reads a bucket width written as Postgres interval text:
// '15 minutes', '1 hour', '1 day', '7 days', '1 week', '1 month',
// '3 months', '1 year', the abbreviations Postgres knows ('1 mon', '2 hrs',
// '1 d'), Postgres' own output ('1 day', '3 mons', '01:00:00', '00:15:00'),
// and ISO 8601 designators ('P1D', 'PT15M', 'P3M'). Fractions spill into
// smaller units exactly as Postgres 15 spills them ('1.5 hours' is 90
// minutes, '1.5 years' is 18 months). A unit alone means one of it ('day'
// is '1 day'); Postgres itself needs the number.
//
// Every text ParseWidth accepts means the same interval to Postgres, which
// the package's tests check against a live server. It accepts less than
// Postgres does: no bare numbers ('5', which Postgres reads as seconds), no
// SQL-standard year-month forms ('1-2').
//
// The width must then be one positive whole number of one kind (see
// Width); a mixed or negative width is an error that says what to write.
func ParseWidth(s string) (Width, error) {
	text := strings.TrimSpace(s)
	if text == "" {
		return Width{}, errors.New("bucket width is empty: give an interval such as '1 day', '1 hour' or '1 month'")
	}
	var (
		acc iv
		err error
	)
	if strings.HasPrefix(text, "P") {
		acc, err = parseISO(text)
	} else {
		acc, err = parsePostgres(text)
	}
	if err != nil {
		return Width{}, err
	}
	w, err := acc.width(text)
	if err != nil {
		return Width{}, err
	}
	return w, w.validate(text)
}

// iv accumulates interval fields while parsing, wide enough to detect
// overflow before it narrows to a Width.
type iv struct {
	months, days, micros int64
}

func (a iv) width(text string) (Width, error) {
	if a.months < math.MinInt32 || a.months > math.MaxInt32 || a.days < math.MinInt32 || a.days > math.MaxInt32 ||
		a.micros < -maxMicros || a.micros > maxMicros {
		return Width{}, fmt.Errorf("bucket width '%s' is out of range: use a width of at most some thousand years", text)
	}
	return Width{Months: int(a.months), Days: int(a.days), Micros: a.micros}, nil
}

// maxMicros bounds the time part well inside int64 so that a sum of two
// parts cannot overflow: about 73,000 years.
const maxMicros = math.MaxInt64 / 4

// unit is one interval unit word of Postgres' deltatktbl.
type unit int

const (
	uMicro unit = iota
	uMilli
	uSecond
	uMinute
	uHour
	uDay
	uWeek
	uMonth
	uYear
	uDecade
	uCentury
	uMillennium
)

// units maps the unit words Postgres 15 accepts in interval input (the
// deltatktbl table of datetime.c) to their unit.
var units = map[string]unit{
	"us": uMicro, "usec": uMicro, "usecs": uMicro, "useconds": uMicro, "microsecond": uMicro, "microseconds": uMicro,
	"ms": uMilli, "msec": uMilli, "msecs": uMilli, "mseconds": uMilli, "millisecond": uMilli, "milliseconds": uMilli,
	"s": uSecond, "sec": uSecond, "secs": uSecond, "second": uSecond, "seconds": uSecond,
	"m": uMinute, "min": uMinute, "mins": uMinute, "minute": uMinute, "minutes": uMinute,
	"h": uHour, "hr": uHour, "hrs": uHour, "hour": uHour, "hours": uHour,
	"d": uDay, "day": uDay, "days": uDay,
	"w": uWeek, "week": uWeek, "weeks": uWeek,
	"mon": uMonth, "mons": uMonth, "month": uMonth, "months": uMonth,
	"y": uYear, "yr": uYear, "yrs": uYear, "year": uYear, "years": uYear,
	"dec": uDecade, "decs": uDecade, "decade": uDecade, "decades": uDecade,
	"c": uCentury, "cent": uCentury, "century": uCentury, "centuries": uCentury,
	"mil": uMillennium, "mils": uMillennium, "millennium": uMillennium, "millennia": uMillennium,
}

// notIntervals are words people write for a bucket that are not interval
// units, with what to write instead.
var notIntervals = map[string]string{
	"quarter": "3 months", "quarters": "3 months", "qtr": "3 months", "quarterly": "3 months",
	"hourly": "1 hour", "daily": "1 day", "weekly": "1 week", "monthly": "1 month", "yearly": "1 year", "annual": "1 year",
	"annually": "1 year", "minutely": "1 minute", "fortnight": "14 days", "fortnights": "14 days", "fortnightly": "14 days",
}

// add applies one "value unit" field with Postgres 15's rules (DecodeInterval
// and its Adjust* helpers): the whole part scales exactly, a fraction spills
// into the next smaller kind, months to 30-day days, days to 24-hour time.
func (a *iv) add(val int64, frac float64, u unit, text string) error {
	over := fmt.Errorf("bucket width '%s' is out of range: use a width of at most some thousand years", text)
	mul := func(v, k int64) (int64, bool) {
		if v > math.MaxInt64/k || v < -math.MaxInt64/k {
			return 0, false
		}
		return v * k, true
	}
	micros := func(v int64, f float64, scale int64) error {
		m, ok := mul(v, scale)
		if !ok || m > maxMicros || m < -maxMicros {
			return over
		}
		a.micros += m + fracMicros(f, scale)
		if a.micros > maxMicros || a.micros < -maxMicros {
			return over
		}
		return nil
	}
	years := func(scale int64) error {
		m, ok := mul(val, 12*scale)
		if !ok {
			return over
		}
		a.months += m + int64(math.RoundToEven(frac*float64(scale)*12))
		return nil
	}
	fracDays := func(f float64, scale int64) error {
		if f == 0 {
			return nil
		}
		f *= float64(scale)
		extra := int64(f) // C's (int) conversion truncates toward zero
		a.days += extra
		return micros(0, f-float64(extra), microsPerDay)
	}
	switch u {
	case uMicro:
		return micros(val, frac, 1)
	case uMilli:
		return micros(val, frac, 1000)
	case uSecond:
		return micros(val, frac, microsPerSecond)
	case uMinute:
		return micros(val, frac, microsPerMinute)
	case uHour:
		return micros(val, frac, microsPerHour)
	case uDay:
		a.days += val
		return micros(0, frac, microsPerDay)
	case uWeek:
		d, ok := mul(val, 7)
		if !ok {
			return over
		}
		a.days += d
		return fracDays(frac, 7)
	case uMonth:
		a.months += val
		return fracDays(frac, 30)
	case uYear:
		return years(1)
	case uDecade:
		return years(10)
	case uCentury:
		return years(100)
	case uMillennium:
		return years(1000)
	}
	return nil
}

// fracMicros is Postgres' AdjustFractMicroseconds: frac*scale truncated,
// plus the rounded (half to even, C's rint) leftover microsecond.
func fracMicros(frac float64, scale int64) int64 {
	if frac == 0 {
		return 0
	}
	frac *= float64(scale)
	us := int64(frac)
	return us + int64(math.RoundToEven(frac-float64(us)))
}

// number splits a decimal like "-1.5" into its integer part and its signed
// fraction, as Postgres does (strtoi64, then strtod of the rest).
func number(s string) (val int64, frac float64, ok bool) {
	neg := false
	body := s
	if body != "" && (body[0] == '+' || body[0] == '-') {
		neg = body[0] == '-'
		body = body[1:]
	}
	intPart, fracPart, hasDot := strings.Cut(body, ".")
	if intPart == "" && (!hasDot || fracPart == "") {
		return 0, 0, false
	}
	for _, r := range intPart + fracPart {
		if r < '0' || r > '9' {
			return 0, 0, false
		}
	}
	if intPart != "" {
		v, err := strconv.ParseInt(intPart, 10, 64)
		if err != nil {
			return 0, 0, false
		}
		val = v
	}
	if fracPart != "" {
		f, err := strconv.ParseFloat("0."+fracPart, 64)
		if err != nil {
			return 0, 0, false
		}
		frac = f
	}
	if neg {
		val, frac = -val, -frac
	}
	return val, frac, true
}

// parsePostgres reads the postgres-style interval text: optional "@", then
// "number unit" fields and at most one "[-]h:m[:s[.f]]" time field, then an
// optional "ago".
func parsePostgres(text string) (iv, error) {
	syntax := fmt.Errorf("bucket width '%s' is not an interval: write a number and a unit, "+
		"such as '15 minutes', '1 day' or '3 months'", text)
	toks := tokens(strings.ToLower(text))
	if len(toks) > 0 && toks[0] == "@" {
		toks = toks[1:]
	}
	ago := false
	if len(toks) > 0 && toks[len(toks)-1] == "ago" {
		ago, toks = true, toks[:len(toks)-1]
	}
	if len(toks) == 0 {
		return iv{}, syntax
	}
	for _, t := range toks {
		if hint, ok := notIntervals[t]; ok {
			return iv{}, fmt.Errorf("bucket width '%s' is not a Postgres interval: write '%s'", text, hint)
		}
	}
	// A unit alone means one of it.
	if len(toks) == 1 {
		if _, ok := units[toks[0]]; ok {
			toks = []string{"1", toks[0]}
		}
	}
	var acc iv
	var given mask
	for i := 0; i < len(toks); i++ {
		tok := toks[i]
		if strings.Contains(tok, ":") {
			if given&timeMask != 0 {
				return iv{}, fmt.Errorf("bucket width '%s' gives the time of day twice: write it once, such as '01:30:00'", text)
			}
			us, ok := clock(tok)
			if !ok {
				return iv{}, syntax
			}
			given |= timeMask
			acc.micros += us
			continue
		}
		val, frac, ok := number(tok)
		if !ok {
			if _, isUnit := units[tok]; isUnit {
				return iv{}, fmt.Errorf("bucket width '%s' has the unit %q without a number: write e.g. '1 %s'", text, tok, tok)
			}
			return iv{}, fmt.Errorf("bucket width '%s' has the unknown word %q: use seconds, minutes, hours, "+
				"days, weeks, months or years, such as '15 minutes'", text, tok)
		}
		if i+1 == len(toks) {
			return iv{}, fmt.Errorf("bucket width '%s' has the number %s without a unit: write e.g. '%s minutes' or '%s days'",
				text, tok, tok, tok)
		}
		i++
		word := toks[i]
		u, ok := units[word]
		if !ok {
			if hint, bad := notIntervals[word]; bad {
				return iv{}, fmt.Errorf("bucket width '%s' is not a Postgres interval: write '%s'", text, hint)
			}
			return iv{}, fmt.Errorf("bucket width '%s' has the unknown unit %q: use seconds, minutes, hours, "+
				"days, weeks, months or years, such as '15 minutes'", text, word)
		}
		m := mask(1) << u
		if u == uSecond && frac != 0 {
			m = secondsMask // a fractional second also gives milli- and microseconds
		}
		if given&m != 0 {
			return iv{}, fmt.Errorf("bucket width '%s' gives %s twice: write each unit once, such as '90 minutes'", text, word)
		}
		given |= m
		if err := acc.add(val, frac, u, text); err != nil {
			return iv{}, err
		}
	}
	if ago {
		acc = iv{-acc.months, -acc.days, -acc.micros}
	}
	return acc, nil
}

// mask is a set of units already given, like Postgres' fmask: a unit may
// appear once, and a time field h:m:s gives hours down to microseconds.
type mask uint

const (
	secondsMask = mask(1)<<uSecond | mask(1)<<uMilli | mask(1)<<uMicro
	timeMask    = secondsMask | mask(1)<<uMinute | mask(1)<<uHour
)

// tokens splits interval text at spaces and between a number and the word
// that follows it without a space ("1day").
func tokens(s string) []string {
	var out []string
	for _, f := range strings.Fields(s) {
		for f != "" {
			i := 0
			for i < len(f) && (f[i] == '+' || f[i] == '-' || f[i] == '.' || f[i] == ':' || (f[i] >= '0' && f[i] <= '9')) {
				i++
			}
			if i == 0 {
				j := 0
				for j < len(f) && !(f[j] >= '0' && f[j] <= '9') && f[j] != '+' && f[j] != '-' {
					j++
				}
				if j == 0 {
					j = len(f)
				}
				i = j
			}
			out = append(out, f[:i])
			f = f[i:]
		}
	}
	return out
}

// clock reads a time field: h:m, h:m:s[.f], or m:s.f (two fields with a
// fraction are minutes and seconds, as in Postgres' DecodeTimeCommon). A
// leading sign applies to the whole field.
func clock(tok string) (int64, bool) {
	neg := false
	if tok[0] == '-' || tok[0] == '+' {
		neg = tok[0] == '-'
		tok = tok[1:]
	}
	parts := strings.Split(tok, ":")
	if len(parts) < 2 || len(parts) > 3 {
		return 0, false
	}
	digits := func(s string) (int64, bool) {
		if s == "" {
			return 0, false
		}
		for _, r := range s {
			if r < '0' || r > '9' {
				return 0, false
			}
		}
		v, err := strconv.ParseInt(s, 10, 64)
		return v, err == nil
	}
	seconds := func(s string) (int64, int64, bool) {
		whole, fracText, hasDot := strings.Cut(s, ".")
		sec, ok := digits(whole)
		if !ok {
			return 0, 0, false
		}
		var frac int64
		if hasDot && fracText != "" {
			if _, ok := digits(fracText); !ok {
				return 0, 0, false
			}
			f, err := strconv.ParseFloat("0."+fracText, 64)
			if err != nil {
				return 0, 0, false
			}
			frac = int64(math.RoundToEven(f * microsPerSecond))
		}
		return sec, frac, true
	}
	var h, m, sec, frac int64
	var ok bool
	if h, ok = digits(parts[0]); !ok {
		return 0, false
	}
	switch {
	case len(parts) == 3:
		if m, ok = digits(parts[1]); !ok {
			return 0, false
		}
		if sec, frac, ok = seconds(parts[2]); !ok {
			return 0, false
		}
	case strings.Contains(parts[1], "."):
		m = h
		h = 0
		if sec, frac, ok = seconds(parts[1]); !ok {
			return 0, false
		}
	default:
		if m, ok = digits(parts[1]); !ok {
			return 0, false
		}
	}
	if m > 59 || sec > 60 || frac > microsPerSecond || h > maxMicros/microsPerHour {
		return 0, false
	}
	us := h*microsPerHour + m*microsPerMinute + sec*microsPerSecond + frac
	if neg {
		us = -us
	}
	return us, true
}

// parseISO reads ISO 8601 "format with designators": P[nY][nM][nW][nD]
// [T[nH][nM][nS]], numbers possibly fractional, as Postgres'
// DecodeISO8601Interval does. Designators are upper case, as Postgres
// requires.
func parseISO(text string) (iv, error) {
	syntax := fmt.Errorf("bucket width '%s' is not an ISO 8601 duration: write e.g. 'P1D', 'PT15M' or 'P3M'", text)
	s := text[1:]
	if s == "" {
		return iv{}, syntax
	}
	var acc iv
	inTime := false
	seen := map[string]bool{}
	for s != "" {
		if s[0] == 'T' {
			if inTime {
				return iv{}, syntax
			}
			inTime = true
			s = s[1:]
			if s == "" {
				return iv{}, syntax
			}
			continue
		}
		i := 0
		for i < len(s) && (s[i] == '-' || s[i] == '+' || s[i] == '.' || (s[i] >= '0' && s[i] <= '9')) {
			i++
		}
		if i == len(s) {
			return iv{}, syntax
		}
		val, frac, ok := number(s[:i])
		if !ok {
			return iv{}, syntax
		}
		des := string(s[i])
		key := des
		if inTime {
			key = "T" + des
		}
		if seen[key] {
			return iv{}, syntax
		}
		seen[key] = true
		var u unit
		switch key {
		case "Y":
			u = uYear
		case "M":
			u = uMonth
		case "W":
			u = uWeek
		case "D":
			u = uDay
		case "TH":
			u = uHour
		case "TM":
			u = uMinute
		case "TS":
			u = uSecond
		default:
			return iv{}, syntax
		}
		if err := acc.add(val, frac, u, text); err != nil {
			return iv{}, err
		}
		s = s[i+1:]
	}
	return acc, nil
}

func abs64(v int64) int64 {
	if v < 0 {
		return -v
	}
	return v
}
