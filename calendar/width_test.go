package calendar

import (
	"context"
	"errors"
	"fmt"
	"math/rand/v2"
	"strings"
	"testing"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgconn"
	"github.com/jackc/pgx/v5/pgtype"
)

func TestParseWidth(t *testing.T) {
	t.Parallel()
	const hour = int64(3_600_000_000) // microseconds in an hour
	cases := []struct {
		in   string
		want Width
	}{
		{"15 minutes", Width{Micros: hour / 4}},
		{"1 hour", Width{Micros: hour}},
		{"2 hours", Width{Micros: 2 * hour}},
		{"1 day", Width{Days: 1}},
		{"day", Width{Days: 1}}, // a unit alone is one of it
		{"7 days", Width{Days: 7}},
		{"1 week", Width{Days: 7}},
		{"1 month", Width{Months: 1}},
		{"1 mon", Width{Months: 1}},
		{"3 months", Width{Months: 3}},
		{"3 mons", Width{Months: 3}},
		{"1 year", Width{Months: 12}},
		{"1.5 years", Width{Months: 18}}, // Postgres: 1 year 6 mons
		{"01:00:00", Width{Micros: hour}},
		{"00:15:00", Width{Micros: hour / 4}},
		{"00:15", Width{Micros: hour / 4}}, // h:m
		{"36:00:00", Width{Micros: 36 * hour}},
		{"1.5 hours", Width{Micros: 3 * hour / 2}},
		{"0.5 months", Width{Days: 15}}, // Postgres spills a month fraction as 30-day days
		{"@ 1 day", Width{Days: 1}},
		{"  1   DAY ", Width{Days: 1}},
		{"1day", Width{Days: 1}},
		{"1 d", Width{Days: 1}},
		{"2 hrs", Width{Micros: 2 * hour}},
		{"90 secs", Width{Micros: 90_000_000}},
		{"1 hour -30 minutes", Width{Micros: hour / 2}},
		{"1 decade", Width{Months: 120}},
		{"P1D", Width{Days: 1}},
		{"PT15M", Width{Micros: hour / 4}},
		{"P3M", Width{Months: 3}},
		{"P1W", Width{Days: 7}},
		{"P1Y2M", Width{Months: 14}},
	}
	for _, c := range cases {
		got, err := ParseWidth(c.in)
		if err != nil {
			t.Errorf("ParseWidth(%q): %v", c.in, err)
			continue
		}
		if got != c.want {
			t.Errorf("ParseWidth(%q) = %+v, want %+v", c.in, got, c.want)
		}
	}
}

func TestParseWidthErrors(t *testing.T) {
	t.Parallel()
	cases := []struct {
		in   string
		want string // a part of the message that says what to do
	}{
		{"", "give an interval such as '1 day'"},
		{"1 quarter", "write '3 months'"},
		{"quarter", "write '3 months'"},
		{"2 quarters", "write '3 months'"},
		{"daily", "write '1 day'"},
		{"monthly", "write '1 month'"},
		{"1 day 2 hours", "such as '26 hours'"},
		{"1 month 3 days", "write whole months such as '1 mon'"},
		{"1 mon 2 hours", "write whole months"},
		{"1.5 days", "such as '36 hours'"},
		{"-1 day", "use a positive interval such as '1 day'"},
		{"1 day ago", "use a positive interval such as '1 day'"},
		{"0 days", "is zero"},
		{"00:00:00", "is zero"},
		{"500 milliseconds", "use at least '00:00:01'"},
		{"1.5 seconds", "round it, for example to '00:00:01'"},
		{"5", "without a unit: write e.g. '5 minutes'"},
		{"3 fortnights", "write '14 days'"},
		{"3 lightyears", "unknown unit \"lightyears\""},
		{"1 day 1 day", "gives day twice"},
		{"1 hour 01:00:00", "time of day twice"},
		{"01:00 00:30", "time of day twice"},
		{"1 mo", "unknown unit \"mo\""},
		{"1:2:3:4", "is not an interval"},
		{"01:60:00", "is not an interval"},
		{"P", "is not an ISO 8601 duration"},
		{"P1X", "is not an ISO 8601 duration"},
		{"99999999999 years", "out of range"},
		{"3000000000 days", "out of range"},
	}
	for _, c := range cases {
		_, err := ParseWidth(c.in)
		if err == nil {
			t.Errorf("ParseWidth(%q) succeeded, want an error containing %q", c.in, c.want)
			continue
		}
		if !strings.Contains(err.Error(), c.want) {
			t.Errorf("ParseWidth(%q) error %q does not contain %q", c.in, err, c.want)
		}
		if !strings.HasPrefix(err.Error(), "bucket width") {
			t.Errorf("ParseWidth(%q) error %q does not start with \"bucket width\"", c.in, err)
		}
	}
}

// widthTexts are inputs for the comparisons with Postgres' own interval
// parser: the forms the documentation names, abbreviations, fractions,
// signs, time fields and ISO 8601, valid and invalid widths alike.
var widthTexts = []string{
	"15 minutes", "1 hour", "2 hours", "1 day", "7 days", "1 week", "1 month", "3 months", "1 year", "1 mon",
	"01:00:00", "00:15:00", "3 mons", "36:00:00", "1:30", "00:15", "1:30.5", "100:00:00", "-01:00:00",
	"@ 1 day", "1 day ago", "1day", "1 DAY", "+1 day", "-1 day", "1 Days", "1 hours",
	"1.5 days", "0.5 months", "1.5 years", "1.5 weeks", "0.1 years", "1.04 years", "1.5 hours", ".5 hours", "1. hours",
	"0.25 days", "0.3 weeks", "0.7 months", "2.5 decades", "1.5 seconds", "1.000001 seconds", "0.0000005 seconds",
	"1 day 2 hours", "1 mon 3 days", "1 mon 2 hours", "1 week 1 day", "1 hour -30 minutes", "1 hour 30 minutes",
	"1 day -24 hours", "2 days -1 day",
	"1 decade", "1 century", "2 millennia", "1 y", "1 m", "1 min", "1 h", "1 d", "1 w", "1 s", "1 ms", "1 us",
	"1000 ms", "1000000 us", "2000 msec", "1 secs", "1 mins", "1 hrs", "1 yrs", "1 weeks", "2 mon", "2 mons",
	"3 decs", "2 cent", "1 mil", "1 millisecond", "1000 milliseconds", "1000000 microseconds",
	"1 second 500 milliseconds", "1.5 seconds 1 millisecond",
	"P1D", "PT15M", "P3M", "P1W", "PT1.5S", "P0.5D", "P1Y2M", "PT1H30M", "P1DT2H", "PT36H", "P-1D", "PT0.5H", "P1.5M",
	"0 days", "00:00:00", "0 months", "500 milliseconds", "59 seconds", "60 seconds", "86400 seconds",
	"1 second", "1 seconds", "2147483647 days", "2147483647 mons", "178956970 years",
	"5", "1-2", "1 2:00", "day", "1 quarter", "1 microsecondsx",
}

// pgInterval reads text as an interval in Postgres, or returns its error.
func pgInterval(ctx context.Context, conn *pgx.Conn, text string) (Width, error) {
	var iv pgtype.Interval
	err := conn.QueryRow(ctx, "SELECT $1::interval", text).Scan(&iv)
	return Width{Months: int(iv.Months), Days: int(iv.Days), Micros: iv.Microseconds}, err
}

// TestParseWidthMatchesPostgres checks the promise of ParseWidth: every text
// it accepts means the same interval to Postgres (the server is the
// reference), and for every text Postgres reads, ParseWidth either reads
// the same interval or refuses it with the same verdict as
// sidetrend.bucket_check.
func TestParseWidthMatchesPostgres(t *testing.T) {
	t.Parallel()
	conn := calendarDB(t)
	ctx := context.Background()

	texts := append([]string(nil), widthTexts...)
	// Random "number unit" texts with fractions, seeded.
	rng := rand.New(rand.NewPCG(1, 1))
	unitWords := []string{"seconds", "minutes", "hours", "days", "weeks", "months", "years", "ms", "us", "decades"}
	for range 400 {
		n := rng.IntN(3) + 1
		var parts []string
		used := map[string]bool{}
		for range n {
			u := unitWords[rng.IntN(len(unitWords))]
			if used[u] {
				continue
			}
			used[u] = true
			num := fmt.Sprint(rng.IntN(200) - 20)
			if rng.IntN(2) == 0 {
				num = fmt.Sprintf("%d.%d", rng.IntN(50), rng.IntN(1000))
			}
			parts = append(parts, num+" "+u)
		}
		texts = append(texts, strings.Join(parts, " "))
	}

	for _, text := range texts {
		goW, goErr := ParseWidth(text)
		pgText := text
		if _, ok := units[strings.ToLower(text)]; ok {
			pgText = "1 " + text // a unit alone is one of it, which Postgres needs spelled out
		}
		pgW, pgErr := pgInterval(ctx, conn, pgText)
		if goErr == nil {
			if pgErr != nil {
				t.Errorf("%q: Go reads %+v, Postgres refuses it: %v", text, goW, pgErr)
				continue
			}
			if goW != pgW {
				t.Errorf("%q: Go reads %+v, Postgres %+v", text, goW, pgW)
			}
			if err := bucketCheck(ctx, conn, pgW); err != nil {
				t.Errorf("%q: Go accepts it, bucket_check refuses: %v", text, err)
			}
			continue
		}
		if pgErr != nil {
			continue // both refuse the text
		}
		// Postgres reads it; Go refuses. Either Go refuses the interval
		// for the reason bucket_check gives, or the text is a form Go does
		// not accept at all (documented: bare numbers and the like).
		sqlErr := bucketCheck(ctx, conn, pgW)
		if vErr := pgW.Validate(); vErr != nil {
			if sqlErr == nil {
				t.Errorf("%q: Go refuses %+v (%v), bucket_check accepts it", text, pgW, vErr)
			}
			continue
		}
		if sqlErr != nil {
			t.Errorf("%q: bucket_check refuses %+v (%v), Go's Validate accepts it", text, pgW, sqlErr)
		}
		t.Logf("%q: Postgres reads %+v; ParseWidth refuses the text: %v", text, pgW, goErr)
	}
}

// bucketCheck runs sidetrend.bucket_check on w and returns its error.
func bucketCheck(ctx context.Context, conn *pgx.Conn, w Width) error {
	_, err := conn.Exec(ctx, "SELECT sidetrend.bucket_check($1)", pgtype.Interval{
		Months: int32(w.Months), Days: int32(w.Days), Microseconds: w.Micros, Valid: true})
	return err
}

// TestWidthStringMatchesPostgres checks String against Postgres' interval
// output (IntervalStyle postgres) for random widths of every sign and mix,
// and that Validate and sidetrend.bucket_check give the same message.
func TestWidthStringMatchesPostgres(t *testing.T) {
	t.Parallel()
	conn := calendarDB(t)
	ctx := context.Background()
	rng := rand.New(rand.NewPCG(1, 1))
	// Scales mix small and large values; each field is zero half the time
	// so that single-kind widths are common.
	pick := func(limit int64) int64 {
		switch rng.IntN(4) {
		case 0, 1:
			return 0
		case 2:
			return rng.Int64N(2*limit+1) - limit
		default:
			return rng.Int64N(5) - 1
		}
	}
	widths := []Width{{}, {Months: 1}, {Months: 12}, {Months: 18}, {Days: 1}, {Days: 7}, {Micros: 3_600_000_000},
		{Micros: 900_000_000}, {Micros: 1_500_000}, {Micros: 500_000}, {Micros: -3_600_000_000}, {Days: -1},
		{Months: -3}, {Days: 1, Micros: 7_200_000_000}, {Days: 1, Micros: -3_600_000_000}, {Days: -1, Micros: 60_000_000}}
	for range 2000 {
		widths = append(widths, Width{Months: int(pick(30000)), Days: int(pick(100000)),
			Micros: pick(1_000_000_000) * []int64{1, 1_000_000, 60_000_000}[rng.IntN(3)]})
	}
	for _, w := range widths {
		arg := pgtype.Interval{Months: int32(w.Months), Days: int32(w.Days), Microseconds: w.Micros, Valid: true}
		var text string
		if err := conn.QueryRow(ctx, "SELECT $1::interval::text", arg).Scan(&text); err != nil {
			t.Fatal(err)
		}
		if got := w.String(); got != text {
			t.Errorf("%+v: String() = %q, Postgres prints %q", w, got, text)
		}
		goErr := w.Validate()
		sqlErr := bucketCheck(ctx, conn, w)
		switch {
		case goErr == nil && sqlErr == nil:
			back, err := ParseWidth(w.String())
			if err != nil || back != w {
				t.Errorf("%+v: ParseWidth(String()) = %+v, %v", w, back, err)
			}
		case goErr == nil || sqlErr == nil:
			t.Errorf("%+v: Validate: %v; bucket_check: %v", w, goErr, sqlErr)
		default:
			var pgErr *pgconn.PgError
			if !errors.As(sqlErr, &pgErr) || pgErr.Code != "22023" {
				t.Errorf("%+v: bucket_check error %v is not invalid_parameter_value (22023)", w, sqlErr)
			} else if pgErr.Message != goErr.Error() {
				t.Errorf("%+v:\n Validate:     %s\n bucket_check: %s", w, goErr, pgErr.Message)
			}
		}
	}
}
