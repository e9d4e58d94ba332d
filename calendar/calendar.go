// Package calendar numbers time buckets: a bucket width (months, days or a
// fixed length of time) in a time zone maps every instant to a bucket index
// and every index back to the instant its bucket starts. The SQL functions
// sidetrend.bucket_index and sidetrend.bucket_start (migration
// 00001_calendar.sql) compute the same numbers inside Postgres; the package's
// tests check the two against each other on a live server.
//
// Buckets count from the origin 2001-01-01 00:00 local time (a Monday), with
// floor division, so instants before 2001 have negative indexes:
//
//	months width n:  i = floor(((y - 2001)*12 + (m - 1)) / n)   local year y, month m
//	days width n:    i = floor((local date - 2001-01-01) / n)   in days
//	time width w:    i = floor((t - origin) / w)                origin = 2001-01-01 00:00 local
//
// So '3 months' buckets start in January, April, July and October, '7 days'
// buckets start on Mondays, and hourly buckets follow the local hour in
// zones whose offset is a whole number of hours. A day bucket across a DST
// change is 23 or 25 hours long; a time bucket is always the same length.
//
// A bucket of months or days starts at local midnight of its first day. Where
// that midnight does not exist (a zone that moves its clocks forward at
// midnight), the bucket starts at the first instant after the gap: it is
// where Postgres' `midnight AT TIME ZONE tz` lands, reading midnight with the
// offset in force before the gap. (For a gap that begins before midnight and
// ends after it, that reading falls inside the day: the tz database has one,
// America/Toronto on 1919-03-31, clocks moved from 23:30 to 00:30, whose day
// bucket starts at 01:00 though 00:30 to 01:00 belongs to it. A date a zone
// skipped altogether, such as 2011-12-30 in Pacific/Apia, has an empty
// bucket.) Where midnight occurs twice (a zone that moves its clocks
// back to midnight, such as America/Havana), the bucket starts at the first
// of the two, where Postgres would take the second, so that a bucket never
// starts after a time it holds. Data times without a zone (timestamp and
// date values) are read as local wall time in the zone, with Postgres' rule
// for readings that occur twice or not at all (see IndexLocal).
//
// Go and Postgres must read the same time zone database: Postgres built
// with --with-system-tzdata (as Debian's is) and Go both read
// /usr/share/zoneinfo.
package calendar

import (
	"errors"
	"fmt"
	"strings"
	"time"
)

// originYear is the year of the origin, 2001-01-01 00:00 local time.
const originYear = 2001

// originDay is 2001-01-01 in days since 1970-01-01.
var originDay = civilDay(originYear, time.January, 1)

// Calendar is a bucket width in a time zone. Make one with New; the zero
// Calendar has no width, and its methods panic.
type Calendar struct {
	w      Width
	tz     string
	loc    *time.Location
	origin int64 // Unix seconds of 2001-01-01 00:00 local
}

// New returns the calendar of a valid width in the zone named tz, an IANA
// name such as 'UTC' or 'Europe/Berlin'.
//
// Names without a region ('CET', 'EST', 'GB') are refused, except 'UTC':
// Postgres reads several of them as fixed-offset abbreviations before it
// looks for a zone of that name, so the same name would mean different
// clocks in Go and in SQL.
func New(w Width, tz string) (Calendar, error) {
	if err := w.Validate(); err != nil {
		return Calendar{}, err
	}
	loc, err := LoadZone(tz)
	if err != nil {
		return Calendar{}, err
	}
	c := Calendar{w: w, tz: tz, loc: loc}
	c.origin = c.midnight(originYear, time.January, 1).Unix()
	return c, nil
}

// LoadZone loads the IANA zone tz with the rules New applies to its name.
func LoadZone(tz string) (*time.Location, error) {
	switch {
	case tz == "":
		return nil, errors.New("time zone is empty: give an IANA name such as 'UTC' or 'Europe/Berlin'")
	case tz != "UTC" && !strings.Contains(tz, "/"):
		return nil, fmt.Errorf("time zone %q is not a region name: use 'UTC' or a name such as 'Europe/Berlin' "+
			"(Postgres reads short names like 'CET' as fixed offsets)", tz)
	case strings.HasPrefix(tz, "right/"):
		return nil, fmt.Errorf("time zone %q counts leap seconds, which Postgres does not: use %q", tz, strings.TrimPrefix(tz, "right/"))
	}
	loc, err := time.LoadLocation(tz)
	if err != nil {
		return nil, fmt.Errorf("time zone %q is not known: use an IANA name such as 'UTC' or 'Europe/Berlin' "+
			"(names are case-sensitive; see pg_timezone_names)", tz)
	}
	return loc, nil
}

// Width is the calendar's bucket width.
func (c Calendar) Width() Width { return c.w }

// Zone is the name of the calendar's time zone.
func (c Calendar) Zone() string { return c.tz }

// Location is the calendar's time zone.
func (c Calendar) Location() *time.Location { return c.loc }

// Index returns the number of the bucket that holds the instant t.
func (c Calendar) Index(t time.Time) int64 {
	if c.w.Micros > 0 {
		return floorDiv(t.Unix()-c.origin, c.w.Micros/microsPerSecond)
	}
	y, m, d := t.In(c.loc).Date()
	return c.dateIndex(y, m, d)
}

// IndexLocal returns the number of the bucket that holds a wall-clock
// reading without a zone, as Postgres timestamp and date values are. The
// reading is wall's Date and Clock in its own location (for a pgx timestamp
// that is UTC), taken as local time in the calendar's zone.
//
// For months and days the wall date decides. For a time width the reading
// becomes an instant as Postgres' `wall AT TIME ZONE tz` makes it: a reading
// that occurs twice (clocks set back) is the later instant, and one that
// does not exist (clocks set forward) is read with the offset in force
// before the gap, which lands after the gap.
func (c Calendar) IndexLocal(wall time.Time) int64 {
	y, m, d := wall.Date()
	if c.w.Micros > 0 {
		hh, mm, ss := wall.Clock()
		sec := civilDay(y, m, d)*86400 + int64(hh*3600+mm*60+ss)
		return floorDiv(c.atTimeZone(sec)-c.origin, c.w.Micros/microsPerSecond)
	}
	return c.dateIndex(y, m, d)
}

// dateIndex is the bucket of a local date for a months or days width.
func (c Calendar) dateIndex(y int, m time.Month, d int) int64 {
	if c.w.Months > 0 {
		return floorDiv((int64(y)-originYear)*12+int64(m)-1, int64(c.w.Months))
	}
	c.mustHaveWidth()
	return floorDiv(civilDay(y, m, d)-originDay, int64(c.w.Days))
}

// Start returns the instant bucket i starts, in the calendar's zone. For
// months and days that is local midnight of the bucket's first day (see the
// package comment for midnights that occur twice or not at all); for a time
// width it is origin + i*w. Index(Start(i)) == i.
func (c Calendar) Start(i int64) time.Time {
	switch {
	case c.w.Micros > 0:
		return time.Unix(c.origin+i*(c.w.Micros/microsPerSecond), 0).In(c.loc)
	case c.w.Months > 0:
		months := i * int64(c.w.Months)
		y := originYear + floorDiv(months, 12)
		m := time.Month(months-floorDiv(months, 12)*12) + 1
		return c.midnight(int(y), m, 1)
	default:
		c.mustHaveWidth()
		y, m, d := time.Unix((originDay+i*int64(c.w.Days))*86400, 0).UTC().Date()
		return c.midnight(y, m, d)
	}
}

func (c Calendar) mustHaveWidth() {
	if c.w.Days <= 0 {
		panic("calendar: Calendar has no bucket width: make it with calendar.New")
	}
}

// midnight returns the first instant of the local date y-m-d: local
// midnight; the earlier of two midnights where clocks are set back to
// midnight; and where midnight falls in a gap, the reading of Postgres'
// AT TIME ZONE (the offset before the gap), which for a gap that begins at
// midnight is the first instant after it. SQL: sidetrend.wall_to_instant.
func (c Calendar) midnight(y int, m time.Month, d int) time.Time {
	wall := civilDay(y, m, d) * 86400
	later := c.atTimeZone(wall)
	// The reading with the offset in force a day earlier: where midnight
	// occurs twice, this is the first of the two.
	earlier := c.atTimeZone(wall-86400) + 86400
	if earlier < later && c.wallSeconds(earlier) == wall {
		return time.Unix(earlier, 0).In(c.loc)
	}
	return time.Unix(later, 0).In(c.loc)
}

// wallSeconds is the local wall-clock reading of Unix second u, in seconds
// since 1970-01-01 00:00 as if it were UTC.
func (c Calendar) wallSeconds(u int64) int64 {
	_, off := time.Unix(u, 0).In(c.loc).Zone()
	return u + int64(off)
}

// atTimeZone turns a wall-clock reading (seconds since 1970-01-01 00:00 as
// if UTC) into Unix seconds the way Postgres' DetermineTimeZoneOffset does
// for `timestamp AT TIME ZONE tz`: find the first offset change after the
// reading minus one day; if both readings (with the offsets before and
// after it) fall on one side of the change, that side's; otherwise, in a gap
// the offset before it, in an overlap the offset after it (both: the later
// instant).
func (c Calendar) atTimeZone(wall int64) int64 {
	prev := wall - 86400
	_, beforeOff := time.Unix(prev, 0).In(c.loc).Zone()
	// A change more than three days on cannot matter: offsets are less
	// than a day, so both readings fall before it.
	boundary, ok := c.nextChange(prev, 3*86400)
	if !ok {
		return wall - int64(beforeOff)
	}
	_, afterOff := time.Unix(boundary, 0).In(c.loc).Zone()
	before, after := wall-int64(beforeOff), wall-int64(afterOff)
	switch {
	case before < boundary && after < boundary:
		return before
	case before >= boundary && after >= boundary:
		return after
	case before > after:
		return before
	default:
		return after
	}
}

// nextChange returns the first Unix second after x, and at most x+limit,
// at which the zone's offset, abbreviation or DST flag changes: a
// transition of the tz file, as Postgres counts them.
//
// time.Time.ZoneBounds finds it, with one catch: past the last transition
// in the file, where the zone's rule string takes over, Go also reports
// the start and end of each year as bounds (and in a leap year an "end" on
// December 31 that does not move on). Bounds where nothing changes are
// skipped, and where the bound does not move on the search goes ahead by
// a day and bisects (the rules change a zone's clock at most a few times a
// year).
func (c Calendar) nextChange(x, limit int64) (int64, bool) {
	zone := func(u int64) (string, int, bool) {
		t := time.Unix(u, 0).In(c.loc)
		name, off := t.Zone()
		return name, off, t.IsDST()
	}
	differs := func(a, b int64) bool {
		n1, o1, d1 := zone(a)
		n2, o2, d2 := zone(b)
		return n1 != n2 || o1 != o2 || d1 != d2
	}
	cur := x
	for cur < x+limit {
		_, end := time.Unix(cur, 0).In(c.loc).ZoneBounds()
		if end.IsZero() {
			return 0, false
		}
		e := end.Unix()
		if e <= cur {
			e = cur + 86400
			if differs(cur, e) {
				// The zone is constant from cur up to the change.
				lo, hi := cur, e
				for hi-lo > 1 {
					mid := lo + (hi-lo)/2
					if differs(cur, mid) {
						hi = mid
					} else {
						lo = mid
					}
				}
				e = hi
			}
		}
		if e > x+limit {
			return 0, false
		}
		if differs(e-1, e) {
			return e, true
		}
		cur = e
	}
	return 0, false
}

// civilDay is the number of days from 1970-01-01 to y-m-d in the proleptic
// Gregorian calendar, as both Go and Postgres count: the days_from_civil
// algorithm (H. Hinnant, "chrono-Compatible Low-Level Date Algorithms"),
// which counts years from March so that the leap day comes last.
func civilDay(y int, m time.Month, d int) int64 {
	yy := int64(y)
	if m <= time.February {
		yy--
	}
	era := floorDiv(yy, 400)
	yoe := yy - era*400                    // [0, 399]
	mp := (int64(m) + 9) % 12              // March = 0
	doy := (153*mp+2)/5 + int64(d) - 1     // [0, 365]
	doe := yoe*365 + yoe/4 - yoe/100 + doy // [0, 146096]
	return era*146097 + doe - 719468       // 719468: days from 0000-03-01 to 1970-01-01
}

// floorDiv is a/b rounded toward minus infinity, for b > 0.
func floorDiv(a, b int64) int64 {
	q := a / b
	if a%b < 0 {
		q--
	}
	return q
}
