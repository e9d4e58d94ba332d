package main

import (
	"bytes"
	"context"
	"fmt"
	"strings"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/sidetrend/sidetrend/internal/pgtest"
)

// TestForecastReadsCopyCSV: a file written by Postgres' COPY ... CSV HEADER
// (timestamptz as 2026-10-03 13:00:00+00, with fractions and with a
// half-hour offset under another TimeZone) forecasts exactly as the same
// rows written in RFC 3339.
func TestForecastReadsCopyCSV(t *testing.T) {
	ctx := context.Background()
	conn, err := pgx.Connect(ctx, pgtest.NewDatabase(t))
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close(ctx)
	if _, err := conn.Exec(ctx, `CREATE TABLE readings (at timestamptz, kiln text, temp float8)`); err != nil {
		t.Fatal(err)
	}
	var rfc strings.Builder
	rfc.WriteString("at,kiln,temp\n")
	start := time.Date(2026, 9, 1, 13, 0, 0, 0, time.UTC)
	for d := 0; d < 30; d++ {
		for i, kiln := range []string{"east", "west"} {
			at := start.Add(time.Duration(d)*24*time.Hour + time.Duration(i)*1500*time.Millisecond)
			v := 900 + 2*float64(d) + 5*float64(i) + float64(d%3)
			if _, err := conn.Exec(ctx, `INSERT INTO readings VALUES ($1, $2, $3)`, at, kiln, v); err != nil {
				t.Fatal(err)
			}
			fmt.Fprintf(&rfc, "%s,%s,%v\n", at.Format(time.RFC3339Nano), kiln, v)
		}
	}
	args := []string{"--time-col", "at", "--key-col", "kiln", "--value-col", "temp", "--lambda", "0.9", "--format", "csv"}
	want, _, err := runForecast(t, append([]string{"--csv", writeFile(t, "rfc.csv", rfc.String())}, args...)...)
	if err != nil {
		t.Fatal(err)
	}
	for _, zone := range []string{"UTC", "Asia/Kolkata"} {
		if _, err := conn.Exec(ctx, `SET TimeZone = '`+zone+`'`); err != nil {
			t.Fatal(err)
		}
		var buf bytes.Buffer
		if _, err := conn.PgConn().CopyTo(ctx, &buf, `COPY readings TO STDOUT (FORMAT csv, HEADER)`); err != nil {
			t.Fatal(err)
		}
		if first := strings.Split(buf.String(), "\n")[1]; !strings.Contains(first, "2026-09-01 ") {
			t.Fatalf("COPY wrote %q", first)
		}
		got, _, err := runForecast(t, append([]string{"--csv", writeFile(t, "copy.csv", buf.String())}, args...)...)
		if err != nil {
			t.Fatalf("COPY CSV under TimeZone %s: %v\n%s", zone, err, buf.String()[:200])
		}
		if got != want {
			t.Errorf("COPY CSV under TimeZone %s forecasts differently:\n%s\nwant\n%s", zone, got, want)
		}
	}
}
