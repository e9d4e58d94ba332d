//go:build ignore

// Command gen_bakery writes examples/bakery.csv: 180 days of daily takings
// at the three branches of Crumb & Kettle, a fictional bakery chain, for
// trying `sidetrend forecast` without a database:
//
//	go run examples/gen_bakery.go > examples/bakery.csv
//	sidetrend forecast --csv examples/bakery.csv --time-col date --key-col branch \
//	    --value-col takings --period 7 --harmonics 2
//
// Each branch has a level and a trend (in currency units per day), a weekly
// cycle (quiet Mondays, busy Saturdays), and normal noise; the seed is
// fixed, so the file is the same on every run. The branches close on
// Christmas Day and New Year's Day, which leaves those days without a row.
package main

import (
	"encoding/csv"
	"fmt"
	"math/rand/v2"
	"os"
	"time"
)

type branch struct {
	name         string
	level, trend float64 // takings on the first day, and their change per day
	noise        float64 // standard deviation of the daily noise
}

var branches = []branch{
	{"harbourside", 1850, 2.4, 120},
	{"millbrook", 1240, -0.8, 90},
	{"old-town", 2310, 0.9, 150},
}

// weekly multiplies the level by weekday: Sunday first.
var weekly = [7]float64{1.10, 0.78, 0.90, 0.94, 1.00, 1.12, 1.26}

func main() {
	rng := rand.New(rand.NewPCG(1, 1))
	first := time.Date(2025, 8, 4, 0, 0, 0, 0, time.UTC)
	const days = 180
	w := csv.NewWriter(os.Stdout)
	w.Write([]string{"date", "branch", "takings"})
	for d := range days {
		day := first.AddDate(0, 0, d)
		if (day.Month() == time.December && day.Day() == 25) || (day.Month() == time.January && day.Day() == 1) {
			continue // closed
		}
		for _, b := range branches {
			v := (b.level + b.trend*float64(d)) * weekly[day.Weekday()]
			v += b.noise * rng.NormFloat64()
			w.Write([]string{day.Format(time.DateOnly), b.name, fmt.Sprintf("%.2f", v)})
		}
	}
	w.Flush()
	if err := w.Error(); err != nil {
		fmt.Fprintln(os.Stderr, "gen_bakery:", err)
		os.Exit(1)
	}
}
