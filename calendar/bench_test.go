package calendar

import (
	"context"
	"fmt"
	"math/rand/v2"
	"testing"
	"time"
)

// benchWidths are one width of each kind, plus the week and the quarter.
var benchWidths = []string{"15 minutes", "1 day", "7 days", "1 month", "3 months"}

func BenchmarkIndex(b *testing.B) {
	rng := rand.New(rand.NewPCG(1, 1))
	ts := make([]time.Time, 1024)
	for i := range ts {
		ts[i] = time.Unix(time.Date(2020, 1, 1, 0, 0, 0, 0, time.UTC).Unix()+rng.Int64N(10*365*86400), 0)
	}
	for _, tz := range []string{"UTC", "Europe/Berlin"} {
		for _, width := range benchWidths {
			c := mustCalendar(b, width, tz)
			b.Run(fmt.Sprintf("tz=%s/width=%s", tz, width), func(b *testing.B) {
				b.ReportAllocs()
				var sum int64
				i := 0
				for b.Loop() {
					sum += c.Index(ts[i&1023])
					i++
				}
				_ = sum
			})
		}
	}
}

func BenchmarkStart(b *testing.B) {
	for _, width := range benchWidths {
		c := mustCalendar(b, width, "Europe/Berlin")
		b.Run("width="+width, func(b *testing.B) {
			b.ReportAllocs()
			i := int64(0)
			for b.Loop() {
				_ = c.Start(i & 1023)
				i++
			}
		})
	}
}

// BenchmarkSQLBucketIndex times sidetrend.bucket_index in Postgres over
// generated rows, the way the capture trigger calls it: once per source
// row, width and zone as constants. It reports ns per row, including
// generate_series and sum; the rows=...,width=none case is that overhead.
func BenchmarkSQLBucketIndex(b *testing.B) {
	conn := calendarDB(b)
	ctx := context.Background()
	for _, rows := range []int{10_000, 100_000, 1_000_000} {
		for _, input := range []string{"timestamptz", "timestamp", "date"} {
			for _, width := range append([]string{"none"}, benchWidths...) {
				expr := "0::bigint"
				if width != "none" {
					expr = fmt.Sprintf("sidetrend.bucket_index(g::%s, '%s', 'Europe/Berlin')", input, width)
				} else if input != "timestamptz" {
					continue
				}
				sql := fmt.Sprintf(`SELECT sum(%s) FROM generate_series(timestamptz '2020-01-01 00:00Z',
					timestamptz '2020-01-01 00:00Z' + interval '1 minute' * %d, interval '1 minute') g`, expr, rows-1)
				b.Run(fmt.Sprintf("rows=%d/input=%s/width=%s", rows, input, width), func(b *testing.B) {
					b.ReportAllocs()
					for b.Loop() {
						var sum *int64
						if err := conn.QueryRow(ctx, sql).Scan(&sum); err != nil {
							b.Fatal(err)
						}
					}
					b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N)/float64(rows), "ns/row")
				})
			}
		}
	}
}
