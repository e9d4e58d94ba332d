// Command sidetrend keeps short-term forecasts and trend slopes for many time
// series in Postgres current as rows land, and serves them to plain SQL.
package main

import (
	"context"
	"errors"
	"fmt"
	"os"
	"os/signal"
	"syscall"
	// A copy of the time zone database for machines without /usr/share/zoneinfo;
	// the calendar must read the same zones as Postgres, which uses the system's.
	_ "time/tzdata"
)

func main() {
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	defer stop()
	if err := newApp().RunContext(ctx, os.Args); err != nil && !errors.Is(err, context.Canceled) {
		fmt.Fprintln(os.Stderr, "sidetrend:", err)
		os.Exit(1)
	}
}
