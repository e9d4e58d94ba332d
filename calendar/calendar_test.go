package calendar

import (
	"strings"
	"testing"
	"time"
)

// testZones are the zones the comparisons run in: UTC, two zones with
// hour-long DST, a half-hour offset without DST, a half-hour DST shift,
// a 45-minute offset, and three zones that change their clocks at midnight
// (Havana sets them back to midnight, so midnight occurs twice there).
var testZones = []string{
	"UTC", "Europe/Berlin", "America/New_York", "Asia/Kolkata", "Australia/Lord_Howe", "Pacific/Chatham",
	"America/Havana", "America/Santiago", "Asia/Beirut",
}

// testWidths are the widths the comparisons run with.
var testWidths = []string{"15 minutes", "1 hour", "1 day", "7 days", "1 month", "3 months", "1 year"}

func mustCalendar(t testing.TB, width, tz string) Calendar {
	t.Helper()
	w, err := ParseWidth(width)
	if err != nil {
		t.Fatal(err)
	}
	c, err := New(w, tz)
	if err != nil {
		t.Fatal(err)
	}
	return c
}

func mustZone(t testing.TB, tz string) *time.Location {
	t.Helper()
	loc, err := time.LoadLocation(tz)
	if err != nil {
		t.Fatal(err)
	}
	return loc
}

func TestNewRejectsZones(t *testing.T) {
	t.Parallel()
	cases := []struct{ tz, want string }{
		{"", "time zone is empty"},
		{"CET", "is not a region name"},
		{"EST", "is not a region name"},
		{"Local", "is not a region name"},
		{"Europe/Atlantis", "is not known"},
		{"europe/berlin", "names are case-sensitive"},
		{"right/Europe/Berlin", "counts leap seconds"},
	}
	for _, c := range cases {
		_, err := New(Width{Days: 1}, c.tz)
		if err == nil || !strings.Contains(err.Error(), c.want) {
			t.Errorf("New(1 day, %q) = %v, want an error containing %q", c.tz, err, c.want)
		}
	}
	if _, err := New(Width{Days: 1, Micros: 1}, "UTC"); err == nil || !strings.Contains(err.Error(), "mixes days with hours") {
		t.Errorf("New with a mixed width = %v, want the mixed-width error", err)
	}
}

// TestOrigin checks bucket 0 of every kind: it starts at 2001-01-01 00:00
// local (a Monday), and the instant before it is in bucket -1.
func TestOrigin(t *testing.T) {
	t.Parallel()
	for _, tz := range testZones {
		for _, width := range testWidths {
			c := mustCalendar(t, width, tz)
			s := c.Start(0)
			want := time.Date(2001, 1, 1, 0, 0, 0, 0, mustZone(t, tz))
			if !s.Equal(want) || s.Weekday() != time.Monday {
				t.Errorf("%s %s: Start(0) = %v, want %v (a Monday)", width, tz, s, want)
			}
			if got := c.Index(s); got != 0 {
				t.Errorf("%s %s: Index(Start(0)) = %d", width, tz, got)
			}
			if got := c.Index(s.Add(-time.Microsecond)); got != -1 {
				t.Errorf("%s %s: Index(Start(0) - 1us) = %d, want -1", width, tz, got)
			}
		}
	}
}

// TestStartIndexRoundTrip checks, for bucket numbers from year 1 to 9999,
// that each bucket starts where the previous one ends: Index(Start(i)) == i
// and the microsecond before Start(i) belongs to bucket i-1.
func TestStartIndexRoundTrip(t *testing.T) {
	t.Parallel()
	for _, tz := range testZones {
		for _, width := range testWidths {
			c := mustCalendar(t, width, tz)
			first := c.Index(time.Date(1, 1, 2, 0, 0, 0, 0, time.UTC))
			last := c.Index(time.Date(9999, 12, 30, 0, 0, 0, 0, time.UTC))
			// About 2,000 buckets spread over the range, plus every bucket
			// of 2024-2027 (DST changes in every test zone).
			step := max((last-first)/2000, 1)
			var is []int64
			for i := first; i <= last; i += step {
				is = append(is, i)
			}
			for i := c.Index(time.Date(2024, 1, 1, 0, 0, 0, 0, time.UTC)); i <= c.Index(time.Date(2028, 1, 1, 0, 0, 0, 0, time.UTC)); i++ {
				is = append(is, i)
			}
			for _, i := range is {
				s := c.Start(i)
				if got := c.Index(s); got != i {
					t.Fatalf("%s %s: Index(Start(%d) = %v) = %d", width, tz, i, s, got)
				}
				if got := c.Index(s.Add(-time.Microsecond)); got != i-1 {
					t.Fatalf("%s %s: Index(Start(%d) - 1us = %v) = %d, want %d", width, tz, i, s.Add(-time.Microsecond), got, i-1)
				}
				if !c.Start(i + 1).After(s) {
					t.Fatalf("%s %s: Start(%d) = %v is not after Start(%d) = %v", width, tz, i+1, c.Start(i+1), i, s)
				}
			}
		}
	}
}

// TestNamedCases are the cases the contract spells out.
func TestNamedCases(t *testing.T) {
	t.Parallel()
	berlin := mustZone(t, "Europe/Berlin")
	day := mustCalendar(t, "1 day", "Europe/Berlin")

	// A 23:30 UTC row on a winter day is 00:30 CET of the next day.
	row := time.Date(2026, 1, 15, 23, 30, 0, 0, time.UTC)
	next := time.Date(2026, 1, 16, 0, 0, 0, 0, berlin)
	if got, want := day.Index(row), day.Index(next); got != want {
		t.Errorf("Berlin daily: 2026-01-15 23:30 UTC is in bucket %d, want %d (2026-01-16 local)", got, want)
	}
	// Days since 2001-01-01 to 2026-01-16: 25 years of 365 days plus 6 leap
	// days (2004, 2008, 2012, 2016, 2020, 2024), plus 15 days of January.
	if got := day.Index(row); got != 25*365+6+15 {
		t.Errorf("Berlin daily: bucket of 2026-01-16 = %d, want %d", got, 25*365+6+15)
	}

	// DST days in Berlin: 2026-03-29 has 23 hours, 2026-10-25 has 25.
	for _, c := range []struct {
		date  time.Time
		hours float64
	}{
		{time.Date(2026, 3, 29, 12, 0, 0, 0, berlin), 23},
		{time.Date(2026, 10, 25, 12, 0, 0, 0, berlin), 25},
		{time.Date(2026, 10, 26, 12, 0, 0, 0, berlin), 24},
	} {
		i := day.Index(c.date)
		if got := day.Start(i + 1).Sub(day.Start(i)).Hours(); got != c.hours {
			t.Errorf("Berlin %s: the day bucket is %v hours, want %v", c.date.Format(time.DateOnly), got, c.hours)
		}
		if s := day.Start(i); s.Hour() != 0 || s.Minute() != 0 || s.Day() != c.date.Day() {
			t.Errorf("Berlin %s: the day bucket starts at %v, want local midnight", c.date.Format(time.DateOnly), s)
		}
	}
	// Hourly buckets in Berlin are absolute: the 23-hour day has 23 of them.
	hour := mustCalendar(t, "1 hour", "Europe/Berlin")
	if got := hour.Index(day.Start(day.Index(time.Date(2026, 3, 30, 0, 0, 0, 0, berlin)))) -
		hour.Index(day.Start(day.Index(time.Date(2026, 3, 29, 0, 0, 0, 0, berlin)))); got != 23 {
		t.Errorf("Berlin 2026-03-29 holds %d hourly buckets, want 23", got)
	}

	// Monthly, quarterly and yearly buckets start on the 1st, local midnight.
	for _, width := range []string{"1 month", "3 months", "1 year"} {
		for _, tz := range testZones {
			c := mustCalendar(t, width, tz)
			loc := mustZone(t, tz)
			for i := int64(-30); i < 400; i += 7 {
				s := c.Start(i).In(loc)
				if s.Day() != 1 || (s.Hour() != 0 && !midnightMissing(s)) || s.Minute() != 0 {
					t.Errorf("%s %s: bucket %d starts at %v, want the 1st at local midnight", width, tz, i, s)
				}
				if width == "3 months" && (s.Month()-1)%3 != 0 {
					t.Errorf("%s %s: bucket %d starts in %v, want January, April, July or October", width, tz, i, s.Month())
				}
				if width == "1 year" && s.Month() != time.January {
					t.Errorf("%s %s: bucket %d starts in %v, want January", width, tz, i, s.Month())
				}
			}
		}
	}

	// Weekly buckets start on Mondays.
	week := mustCalendar(t, "7 days", "America/New_York")
	for i := int64(-5000); i < 5000; i += 37 {
		if wd := week.Start(i).Weekday(); wd != time.Monday {
			t.Fatalf("weekly bucket %d starts on %v", i, wd)
		}
	}
}

// midnightMissing reports whether local midnight of s's date falls in a
// gap, so that the day starts later than 00:00.
func midnightMissing(s time.Time) bool {
	m := time.Date(s.Year(), s.Month(), s.Day(), 0, 0, 0, 0, s.Location())
	return m.Hour() != 0
}

// TestMidnightGapsAndOverlaps checks the rule for local midnights that do
// not exist or occur twice, in zones that change clocks at midnight (dates
// from the tz database's rules for them).
func TestMidnightGapsAndOverlaps(t *testing.T) {
	t.Parallel()
	cases := []struct {
		tz    string
		date  time.Time // the local date whose midnight is special
		start time.Time // when its day bucket starts (UTC)
		why   string
	}{
		// Cuba moves clocks forward at 00:00 CST to 01:00 CDT: the day
		// starts at the first instant after the gap, 05:00 UTC.
		{"America/Havana", time.Date(2024, 3, 10, 0, 0, 0, 0, time.UTC), time.Date(2024, 3, 10, 5, 0, 0, 0, time.UTC), "gap"},
		// Cuba moves clocks back at 01:00 CDT to 00:00 CST: midnight occurs
		// at 04:00 and at 05:00 UTC; the day starts at the first.
		{"America/Havana", time.Date(2024, 11, 3, 0, 0, 0, 0, time.UTC), time.Date(2024, 11, 3, 4, 0, 0, 0, time.UTC), "overlap"},
		// Chile moves clocks forward at 24:00 -04 to 01:00 -03.
		{"America/Santiago", time.Date(2024, 9, 8, 0, 0, 0, 0, time.UTC), time.Date(2024, 9, 8, 4, 0, 0, 0, time.UTC), "gap"},
		// Lebanon moves clocks forward at 00:00 EET to 01:00 EEST.
		{"Asia/Beirut", time.Date(2024, 3, 31, 0, 0, 0, 0, time.UTC), time.Date(2024, 3, 30, 22, 0, 0, 0, time.UTC), "gap"},
		// Berlin's first standard time: 1893-04-01 00:00 LMT (+0:53:28)
		// became 00:06:32 CET, a gap of 6 min 32 s at midnight.
		{"Europe/Berlin", time.Date(1893, 4, 1, 0, 0, 0, 0, time.UTC), time.Date(1893, 3, 31, 23, 6, 32, 0, time.UTC), "gap"},
	}
	for _, c := range cases {
		cal := mustCalendar(t, "1 day", c.tz)
		i := cal.IndexLocal(c.date)
		if got := cal.Start(i); !got.Equal(c.start) {
			t.Errorf("%s %s (%s): the day starts at %v, want %v", c.tz, c.date.Format(time.DateOnly), c.why, got.UTC(), c.start)
		}
		if got := cal.Index(c.start); got != i {
			t.Errorf("%s %s: Index(start) = %d, want %d", c.tz, c.date.Format(time.DateOnly), got, i)
		}
		if got := cal.Index(c.start.Add(-time.Microsecond)); got != i-1 {
			t.Errorf("%s %s: the microsecond before the start is in bucket %d, want %d", c.tz, c.date.Format(time.DateOnly), got, i-1)
		}
	}
}

// TestExtremes checks years 1 and 9999 with the finest width, one second,
// where bucket numbers are largest (about 2.5e11 over 8,000 years), and
// that nothing overflows.
func TestExtremes(t *testing.T) {
	t.Parallel()
	for _, tz := range testZones {
		sec := mustCalendar(t, "1 second", tz)
		for _, ts := range []time.Time{
			time.Date(1, 1, 1, 0, 0, 0, 0, time.UTC),
			time.Date(1, 1, 1, 23, 59, 59, 999999000, time.UTC),
			time.Date(9999, 12, 31, 23, 59, 59, 999999000, time.UTC),
		} {
			i := sec.Index(ts)
			// The origin is within a day of 2001-01-01 00:00 UTC, and 2000
			// or 7999 years hold at least 365 days each.
			if i > 0 && i < 7999*365*86400 || i < 0 && i > -2000*365*86400 {
				t.Errorf("1 second %s: Index(%v) = %d is too close to 0", tz, ts, i)
			}
			if got, want := sec.Start(i), ts.Truncate(time.Second); !got.Equal(want) {
				t.Errorf("1 second %s: Start(Index(%v)) = %v", tz, ts, got)
			}
		}
		for _, width := range testWidths {
			c := mustCalendar(t, width, tz)
			for _, ts := range []time.Time{time.Date(1, 1, 1, 12, 0, 0, 0, time.UTC), time.Date(9999, 12, 31, 0, 0, 0, 0, time.UTC)} {
				i := c.Index(ts)
				if s := c.Start(i); s.After(ts) || !c.Start(i+1).After(ts) {
					t.Errorf("%s %s: %v is not in bucket %d [%v, %v)", width, tz, ts, i, s, c.Start(i+1))
				}
			}
		}
	}
}

func TestIndexLocal(t *testing.T) {
	t.Parallel()
	// Months and days read the wall date alone.
	day := mustCalendar(t, "1 day", "Pacific/Chatham")
	wall := time.Date(2026, 1, 16, 23, 59, 0, 0, time.UTC)
	if got, want := day.IndexLocal(wall), day.Index(time.Date(2026, 1, 16, 12, 0, 0, 0, day.Location())); got != want {
		t.Errorf("Chatham daily: IndexLocal(2026-01-16 23:59) = %d, want %d", got, want)
	}
	// A fixed width reads the wall clock in the zone: 02:30 on Berlin's
	// 23-hour day does not exist and is read with the offset before the
	// gap (CET), which is 03:30 CEST, 01:30 UTC.
	hour := mustCalendar(t, "1 hour", "Europe/Berlin")
	if got, want := hour.IndexLocal(time.Date(2026, 3, 29, 2, 30, 0, 0, time.UTC)), hour.Index(time.Date(2026, 3, 29, 1, 30, 0, 0, time.UTC)); got != want {
		t.Errorf("Berlin hourly: IndexLocal(2026-03-29 02:30) = %d, want %d", got, want)
	}
	// 02:30 on the 25-hour day occurs twice and is read as the later one,
	// CET, 01:30 UTC.
	if got, want := hour.IndexLocal(time.Date(2026, 10, 25, 2, 30, 0, 0, time.UTC)), hour.Index(time.Date(2026, 10, 25, 1, 30, 0, 0, time.UTC)); got != want {
		t.Errorf("Berlin hourly: IndexLocal(2026-10-25 02:30) = %d, want %d", got, want)
	}
}

// TestCivilDay checks the day count against Go's own calendar arithmetic
// (time.Date(...).Unix() / 86400) for every day from year 1 to 9999.
func TestCivilDay(t *testing.T) {
	t.Parallel()
	d := time.Date(1, 1, 1, 0, 0, 0, 0, time.UTC)
	for d.Year() < 10000 {
		if got, want := civilDay(d.Year(), d.Month(), d.Day()), d.Unix()/86400; got != want {
			t.Fatalf("civilDay(%s) = %d, want %d", d.Format(time.DateOnly), got, want)
		}
		d = d.AddDate(0, 0, 1)
	}
}
