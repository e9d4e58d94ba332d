package calendar

import (
	"context"
	"math/rand/v2"
	"strings"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"
)

// The tests in this file compare the Go calendar with the SQL functions of
// the migration on a live Postgres: both must give the same bucket numbers
// and the same bucket starts, to the microsecond.

// Bounds of the random instants: 0001-01-01 and 9999-12-31 23:59:59 UTC
// in Unix seconds (from time.Date(...).Unix()).
var (
	minUnix = time.Date(1, 1, 1, 0, 0, 0, 0, time.UTC).Unix()
	maxUnix = time.Date(9999, 12, 31, 23, 59, 59, 0, time.UTC).Unix()
)

// transitions lists a zone's offset changes from 1800 to 2100.
func transitions(loc *time.Location) []time.Time {
	var out []time.Time
	c := Calendar{loc: loc}
	u := time.Date(1800, 1, 1, 0, 0, 0, 0, time.UTC).Unix()
	stop := time.Date(2100, 1, 1, 0, 0, 0, 0, time.UTC).Unix()
	for u < stop {
		next, ok := c.nextChange(u, stop-u)
		if !ok {
			break
		}
		out = append(out, time.Unix(next, 0))
		u = next
	}
	return out
}

// randomInstants returns n instants, seeded: a third uniform over years 1
// to 9999, a third uniform over 1850-2100 (where the zone rules change),
// and a third near the zone's offset changes (within a day, and exactly
// at them and a microsecond either side). All have microsecond precision,
// like Postgres timestamps.
func randomInstants(rng *rand.Rand, loc *time.Location, n int) []time.Time {
	tr := transitions(loc)
	lo1850 := time.Date(1850, 1, 1, 0, 0, 0, 0, time.UTC).Unix()
	hi2100 := time.Date(2100, 1, 1, 0, 0, 0, 0, time.UTC).Unix()
	out := make([]time.Time, 0, n)
	for len(out) < n {
		micro := time.Duration(rng.Int64N(1_000_000)) * time.Microsecond
		switch k := len(out) % 3; {
		case k == 0:
			out = append(out, time.Unix(minUnix+rng.Int64N(maxUnix-minUnix), 0).Add(micro))
		case k == 1 || len(tr) == 0:
			out = append(out, time.Unix(lo1850+rng.Int64N(hi2100-lo1850), 0).Add(micro))
		default:
			at := tr[rng.IntN(len(tr))]
			switch rng.IntN(4) {
			case 0:
				out = append(out, at.Add(time.Duration(rng.IntN(3)-1)*time.Microsecond))
			default:
				out = append(out, at.Add(time.Duration(rng.Int64N(2*86400)-86400)*time.Second+micro))
			}
		}
	}
	return out
}

// walls turns instants into wall-clock readings in loc, shifted by a random
// number of minutes so that readings inside gaps and overlaps occur, as UTC
// times (pgx sends a time.Time's fields as the timestamp).
func walls(rng *rand.Rand, ts []time.Time, loc *time.Location) []time.Time {
	out := make([]time.Time, len(ts))
	for i, t := range ts {
		l := t.In(loc).Add(time.Duration(rng.IntN(121)-60) * time.Minute)
		out[i] = time.Date(l.Year(), l.Month(), l.Day(), l.Hour(), l.Minute(), l.Second(), l.Nanosecond(), time.UTC)
	}
	return out
}

// queryInt64s runs a query returning one bigint[] in input order.
func queryInt64s(t *testing.T, conn *pgx.Conn, sql string, args ...any) []int64 {
	t.Helper()
	var out []int64
	if err := conn.QueryRow(context.Background(), sql, args...).Scan(&out); err != nil {
		t.Fatalf("%s: %v", sql, err)
	}
	return out
}

func queryTimes(t *testing.T, conn *pgx.Conn, sql string, args ...any) []time.Time {
	t.Helper()
	var out []time.Time
	if err := conn.QueryRow(context.Background(), sql, args...).Scan(&out); err != nil {
		t.Fatalf("%s: %v", sql, err)
	}
	return out
}

// TestSQLMatchesGo compares bucket_index (timestamptz, timestamp, date) and
// bucket_start with Index, IndexLocal and Start for seeded random times
// from year 1 to 9999, across the test widths and zones. The width and
// zone are query parameters, which the planner folds into constants, as
// they are in the capture triggers.
func TestSQLMatchesGo(t *testing.T) {
	t.Parallel()
	conn := calendarDB(t)
	rng := rand.New(rand.NewPCG(1, 1))
	const n = 1500 // instants per zone and width: 63 combinations, ~95,000 comparisons per function
	for _, tz := range testZones {
		loc := mustZone(t, tz)
		for _, width := range testWidths {
			c := mustCalendar(t, width, tz)
			ts := randomInstants(rng, loc, n)
			iv := c.Width().String()

			got := queryInt64s(t, conn, `SELECT array_agg(sidetrend.bucket_index(t, $2::interval, $3) ORDER BY o)
				FROM unnest($1::timestamptz[]) WITH ORDINALITY AS u(t, o)`, ts, iv, tz)
			idx := make([]int64, n)
			for k, ti := range ts {
				idx[k] = c.Index(ti)
				if got[k] != idx[k] {
					t.Errorf("%s %s: %v (local %v): SQL bucket %d, Go %d", width, tz, ti.UTC(), ti.In(loc), got[k], idx[k])
				}
			}

			starts := queryTimes(t, conn, `SELECT array_agg(sidetrend.bucket_start(i, $2::interval, $3) ORDER BY o)
				FROM unnest($1::bigint[]) WITH ORDINALITY AS u(i, o)`, idx, iv, tz)
			for k, i := range idx {
				if want := c.Start(i); !starts[k].Equal(want) {
					t.Errorf("%s %s: bucket %d: SQL starts %v, Go %v", width, tz, i, starts[k].UTC(), want.UTC())
				}
			}

			// In SQL too, each bucket starts where the previous one ends.
			var wrong int
			if err := conn.QueryRow(context.Background(), `SELECT count(*) FROM unnest($1::bigint[]) AS u(i)
				WHERE sidetrend.bucket_index(sidetrend.bucket_start(i, $2::interval, $3), $2::interval, $3) <> i
				   OR sidetrend.bucket_index(sidetrend.bucket_start(i, $2::interval, $3) - interval '1 microsecond', $2::interval, $3) <> i - 1`,
				idx, iv, tz).Scan(&wrong); err != nil {
				t.Fatal(err)
			}
			if wrong > 0 {
				t.Errorf("%s %s: for %d buckets, SQL bucket_index(bucket_start(i)) is not i or the microsecond before is not in i-1", width, tz, wrong)
			}

			ws := walls(rng, ts, loc)
			got = queryInt64s(t, conn, `SELECT array_agg(sidetrend.bucket_index(w, $2::interval, $3) ORDER BY o)
				FROM unnest($1::timestamp[]) WITH ORDINALITY AS u(w, o)`, ws, iv, tz)
			for k, w := range ws {
				if want := c.IndexLocal(w); got[k] != want {
					t.Errorf("%s %s: timestamp %v: SQL bucket %d, Go %d", width, tz, w.Format(time.DateTime), got[k], want)
				}
			}
			got = queryInt64s(t, conn, `SELECT array_agg(sidetrend.bucket_index(d, $2::interval, $3) ORDER BY o)
				FROM unnest($1::date[]) WITH ORDINALITY AS u(d, o)`, ws, iv, tz)
			for k, w := range ws {
				d := time.Date(w.Year(), w.Month(), w.Day(), 0, 0, 0, 0, time.UTC)
				if want := c.IndexLocal(d); got[k] != want {
					t.Errorf("%s %s: date %v: SQL bucket %d, Go %d", width, tz, d.Format(time.DateOnly), got[k], want)
				}
			}
			if t.Failed() {
				return
			}
		}
	}
}

// TestSQLMatchesGoPerRow runs the comparison with the width and zone taken
// from each row, so that nothing folds at plan time and the planner's
// constant folding cannot hide a difference between the two paths.
func TestSQLMatchesGoPerRow(t *testing.T) {
	t.Parallel()
	conn := calendarDB(t)
	rng := rand.New(rand.NewPCG(2, 2))
	var (
		ts        []time.Time
		ivs, tzs  []string
		calendars []Calendar
	)
	for _, tz := range testZones {
		loc := mustZone(t, tz)
		for _, width := range testWidths {
			c := mustCalendar(t, width, tz)
			for _, ti := range randomInstants(rng, loc, 200) {
				ts, ivs, tzs, calendars = append(ts, ti), append(ivs, c.Width().String()), append(tzs, tz), append(calendars, c)
			}
		}
	}
	got := queryInt64s(t, conn, `SELECT array_agg(sidetrend.bucket_index(t, w, z) ORDER BY o)
		FROM unnest($1::timestamptz[], $2::interval[], $3::text[]) WITH ORDINALITY AS u(t, w, z, o)`, ts, ivs, tzs)
	idx := make([]int64, len(ts))
	for k, ti := range ts {
		idx[k] = calendars[k].Index(ti)
		if got[k] != idx[k] {
			t.Errorf("%s %s: %v: SQL bucket %d, Go %d", ivs[k], tzs[k], ti.UTC(), got[k], idx[k])
		}
	}
	starts := queryTimes(t, conn, `SELECT array_agg(sidetrend.bucket_start(i, w, z) ORDER BY o)
		FROM unnest($1::bigint[], $2::interval[], $3::text[]) WITH ORDINALITY AS u(i, w, z, o)`, idx, ivs, tzs)
	for k, i := range idx {
		if want := calendars[k].Start(i); !starts[k].Equal(want) {
			t.Errorf("%s %s: bucket %d: SQL starts %v, Go %v", ivs[k], tzs[k], i, starts[k].UTC(), want.UTC())
		}
	}
}

// TestAtTimeZoneMatchesPostgres checks the Go reading of wall-clock times
// (atTimeZone) against Postgres' own `timestamp AT TIME ZONE tz` near every
// offset change of the test zones, where gaps and overlaps are.
func TestAtTimeZoneMatchesPostgres(t *testing.T) {
	t.Parallel()
	conn := calendarDB(t)
	for _, tz := range testZones {
		loc := mustZone(t, tz)
		c := mustCalendar(t, "1 hour", tz)
		var ws []time.Time
		for _, at := range transitions(loc) {
			l := at.In(loc)
			base := time.Date(l.Year(), l.Month(), l.Day(), l.Hour(), l.Minute(), l.Second(), 0, time.UTC)
			// Readings every 15 minutes from 3 hours before to 3 hours after
			// the change, and the second either side of it.
			for m := -180; m <= 180; m += 15 {
				ws = append(ws, base.Add(time.Duration(m)*time.Minute))
			}
			ws = append(ws, base.Add(-time.Second), base.Add(time.Second))
		}
		got := queryTimes(t, conn, `SELECT array_agg(w AT TIME ZONE $2 ORDER BY o)
			FROM unnest($1::timestamp[]) WITH ORDINALITY AS u(w, o)`, ws, tz)
		for k, w := range ws {
			want := time.Unix(c.atTimeZone(w.Unix()), 0)
			if !got[k].Equal(want) {
				t.Errorf("%s: '%s' AT TIME ZONE: Postgres %v, Go %v", tz, w.Format(time.DateTime), got[k].UTC(), want.UTC())
			}
		}
	}
}

// TestSQLNamedCases repeats the contract's named cases in SQL.
func TestSQLNamedCases(t *testing.T) {
	t.Parallel()
	conn := calendarDB(t)
	ctx := context.Background()
	var (
		next, same     bool
		h23, h25       float64
		monthStartsDay int
	)
	err := conn.QueryRow(ctx, `SELECT
		sidetrend.bucket_index(timestamptz '2026-01-15 23:30Z', '1 day', 'Europe/Berlin')
			= sidetrend.bucket_index(timestamp '2026-01-16 00:00', '1 day', 'Europe/Berlin'),
		sidetrend.bucket_index(timestamptz '2026-01-15 22:59Z', '1 day', 'Europe/Berlin')
			= sidetrend.bucket_index(date '2026-01-15', '1 day', 'Europe/Berlin'),
		extract(epoch FROM sidetrend.bucket_start(sidetrend.bucket_index(date '2026-03-30', '1 day', 'Europe/Berlin'), '1 day', 'Europe/Berlin')
			- sidetrend.bucket_start(sidetrend.bucket_index(date '2026-03-29', '1 day', 'Europe/Berlin'), '1 day', 'Europe/Berlin')) / 3600,
		extract(epoch FROM sidetrend.bucket_start(sidetrend.bucket_index(date '2026-10-26', '1 day', 'Europe/Berlin'), '1 day', 'Europe/Berlin')
			- sidetrend.bucket_start(sidetrend.bucket_index(date '2026-10-25', '1 day', 'Europe/Berlin'), '1 day', 'Europe/Berlin')) / 3600,
		(SELECT count(*) FROM generate_series(-40, 400) i
		  WHERE extract(day FROM sidetrend.bucket_start(i, '1 month', 'Australia/Lord_Howe') AT TIME ZONE 'Australia/Lord_Howe') = 1
		    AND (sidetrend.bucket_start(i, '1 month', 'Australia/Lord_Howe') AT TIME ZONE 'Australia/Lord_Howe')::time = '00:00')`,
	).Scan(&next, &same, &h23, &h25, &monthStartsDay)
	if err != nil {
		t.Fatal(err)
	}
	if !next {
		t.Error("Berlin: 2026-01-15 23:30 UTC is not in the bucket of 2026-01-16")
	}
	if !same {
		t.Error("Berlin: 2026-01-15 22:59 UTC is not in the bucket of 2026-01-15")
	}
	if h23 != 23 || h25 != 25 {
		t.Errorf("Berlin DST days: %v and %v hours, want 23 and 25", h23, h25)
	}
	// generate_series(-40, 400) is 441 buckets, each starting on the 1st.
	if monthStartsDay != 441 {
		t.Errorf("Lord Howe monthly: %d of 441 buckets start on the 1st at 00:00 local", monthStartsDay)
	}

	// Postgres' own AT TIME ZONE reads an ambiguous midnight as the later
	// instant; bucket_start takes the first, like the Go calendar.
	var pgReading, start time.Time
	if err := conn.QueryRow(ctx, `SELECT timestamp '2024-11-03 00:00' AT TIME ZONE 'America/Havana',
		sidetrend.bucket_start(sidetrend.bucket_index(date '2024-11-03', '1 day', 'America/Havana'), '1 day', 'America/Havana')`,
	).Scan(&pgReading, &start); err != nil {
		t.Fatal(err)
	}
	// 00:00 CDT (-04) is 04:00 UTC; 00:00 CST (-05) is 05:00 UTC.
	if !pgReading.Equal(time.Date(2024, 11, 3, 5, 0, 0, 0, time.UTC)) || !start.Equal(time.Date(2024, 11, 3, 4, 0, 0, 0, time.UTC)) {
		t.Errorf("Havana 2024-11-03: AT TIME ZONE %v, bucket_start %v; want 05:00 and 04:00 UTC", pgReading.UTC(), start.UTC())
	}

	// A midnight that does not exist: Cuba goes from 00:00 CST (-05) to
	// 01:00 CDT (-04) on 2024-03-10. Postgres reads the midnight with the
	// offset before the gap, 05:00 UTC, which is the first instant after
	// the gap; the day bucket starts there.
	if err := conn.QueryRow(ctx, `SELECT timestamp '2024-03-10 00:00' AT TIME ZONE 'America/Havana',
		sidetrend.bucket_start(sidetrend.bucket_index(date '2024-03-10', '1 day', 'America/Havana'), '1 day', 'America/Havana')`,
	).Scan(&pgReading, &start); err != nil {
		t.Fatal(err)
	}
	if want := time.Date(2024, 3, 10, 5, 0, 0, 0, time.UTC); !pgReading.Equal(want) || !start.Equal(want) {
		t.Errorf("Havana 2024-03-10: AT TIME ZONE %v, bucket_start %v; want both %v", pgReading.UTC(), start.UTC(), want)
	}
}

// TestSQLErrors checks that the SQL functions refuse bad widths and zones
// with invalid_parameter_value and a message that says what to write.
func TestSQLErrors(t *testing.T) {
	t.Parallel()
	conn := calendarDB(t)
	ctx := context.Background()
	cases := []struct{ sql, want string }{
		{`SELECT sidetrend.bucket_index(now(), '1 day 2 hours', 'UTC')`, "such as '26 hours'"},
		{`SELECT sidetrend.bucket_index(now()::timestamp, '1 mon 1 day', 'UTC')`, "write whole months"},
		{`SELECT sidetrend.bucket_index(current_date, '-1 day', 'UTC')`, "such as '1 day'"},
		{`SELECT sidetrend.bucket_start(0, '0.5 seconds', 'UTC')`, "at least '00:00:01'"},
		{`SELECT sidetrend.bucket_check(NULL)`, "bucket width is missing"},
		{`SELECT sidetrend.bucket_index(now(), w, 'UTC') FROM (VALUES (interval '1 day'), (interval '0')) v(w)`, "is zero"},
		{`SELECT sidetrend.zone_check('CET')`, "is not a region name"},
		{`SELECT sidetrend.zone_check('Europe/Atlantis')`, "is not known"},
		{`SELECT sidetrend.zone_check('')`, "time zone is empty"},
	}
	for _, c := range cases {
		_, err := conn.Exec(ctx, c.sql)
		if err == nil || !strings.Contains(err.Error(), c.want) || !strings.Contains(err.Error(), "22023") {
			t.Errorf("%s: %v, want SQLSTATE 22023 and %q", c.sql, err, c.want)
		}
	}
	for _, tz := range append(testZones, "Etc/GMT+5") {
		if _, err := conn.Exec(ctx, `SELECT sidetrend.zone_check($1)`, tz); err != nil {
			t.Errorf("zone_check(%q): %v", tz, err)
		}
		if _, err := LoadZone(tz); err != nil {
			t.Errorf("LoadZone(%q): %v", tz, err)
		}
	}
	// Go and SQL refuse the same zone names with the same message.
	for _, tz := range []string{"CET", "EST", "Europe/Atlantis", "right/UTC"} {
		_, goErr := LoadZone(tz)
		_, sqlErr := conn.Exec(ctx, `SELECT sidetrend.zone_check($1)`, tz)
		if goErr == nil || sqlErr == nil || !strings.Contains(sqlErr.Error(), goErr.Error()) {
			t.Errorf("zone %q: Go %v, SQL %v", tz, goErr, sqlErr)
		}
	}
}

// TestSQLMatchesGoAllZones runs a smaller comparison in every zone both
// sides know, to catch a zone whose rules Go and Postgres read differently.
func TestSQLMatchesGoAllZones(t *testing.T) {
	if testing.Short() {
		t.Skip("every zone: skipped with -short")
	}
	t.Parallel()
	conn := calendarDB(t)
	ctx := context.Background()
	rows, err := conn.Query(ctx, `SELECT name FROM pg_timezone_names WHERE strpos(name, '/') > 0
		AND NOT starts_with(name, 'posix/') ORDER BY name`)
	if err != nil {
		t.Fatal(err)
	}
	zones, err := pgx.CollectRows(rows, pgx.RowTo[string])
	if err != nil {
		t.Fatal(err)
	}
	rng := rand.New(rand.NewPCG(3, 3))
	var (
		ts        []time.Time
		ivs, tzs  []string
		calendars []Calendar
	)
	for _, tz := range zones {
		loc, err := LoadZone(tz)
		if err != nil {
			t.Errorf("Postgres knows %q, Go does not: %v", tz, err)
			continue
		}
		for _, width := range []string{"1 hour", "1 day", "1 month"} {
			c := mustCalendar(t, width, tz)
			for _, ti := range randomInstants(rng, loc, 60) {
				ts, ivs, tzs, calendars = append(ts, ti), append(ivs, width), append(tzs, tz), append(calendars, c)
			}
		}
	}
	got := queryInt64s(t, conn, `SELECT array_agg(sidetrend.bucket_index(t, w, z) ORDER BY o)
		FROM unnest($1::timestamptz[], $2::interval[], $3::text[]) WITH ORDINALITY AS u(t, w, z, o)`, ts, ivs, tzs)
	idx := make([]int64, len(ts))
	bad := map[string]int{}
	for k, ti := range ts {
		idx[k] = calendars[k].Index(ti)
		if got[k] != idx[k] {
			if bad[tzs[k]]++; bad[tzs[k]] <= 3 {
				t.Errorf("%s %s: %v: SQL bucket %d, Go %d", ivs[k], tzs[k], ti.UTC(), got[k], idx[k])
			}
		}
	}
	starts := queryTimes(t, conn, `SELECT array_agg(sidetrend.bucket_start(i, w, z) ORDER BY o)
		FROM unnest($1::bigint[], $2::interval[], $3::text[]) WITH ORDINALITY AS u(i, w, z, o)`, idx, ivs, tzs)
	for k, i := range idx {
		if want := calendars[k].Start(i); !starts[k].Equal(want) {
			if bad[tzs[k]]++; bad[tzs[k]] <= 3 {
				t.Errorf("%s %s: bucket %d: SQL starts %v, Go %v", ivs[k], tzs[k], i, starts[k].UTC(), want.UTC())
			}
		}
	}
	t.Logf("%d zones, %d comparisons of each function", len(zones), len(ts))
}

// TestMonthNumber checks the SQL day-count formula for months against the
// plain count (year - 2001) * 12 + month - 1 for the 1st and the last day of
// every month from year 1 to 9999.
func TestMonthNumber(t *testing.T) {
	t.Parallel()
	conn := calendarDB(t)
	var wrong, months int64
	if err := conn.QueryRow(context.Background(), `
		SELECT count(*) FILTER (WHERE sidetrend.month_number(m::date) <> k
		                           OR sidetrend.bucket_index((m + interval '1 month' - interval '1 day')::date, '1 month', 'UTC') <> k),
		       count(*)
		FROM generate_series(timestamp '0001-01-01', timestamp '9999-12-01', interval '1 month') m,
		     LATERAL (SELECT (date_part('year', m)::bigint - 2001) * 12 + date_part('month', m)::bigint - 1 AS k) x`,
	).Scan(&wrong, &months); err != nil {
		t.Fatal(err)
	}
	// 9999 years of 12 months.
	if months != 9999*12 || wrong != 0 {
		t.Errorf("%d of %d months numbered wrong (want 0 of %d)", wrong, months, 9999*12)
	}
}
