package main

import (
	"context"
	"strings"
	"testing"
)

// TestAlterCommand changes the sales tracker from the CLI: the message says
// what changed and what follows, a run replays the series with the new
// horizon, and a bad flag is refused with the server's hint.
func TestAlterCommand(t *testing.T) {
	url, pool := salesDB(t)
	ctx := context.Background()
	out, err := runCLI(t, ctx, "alter", "--db", url, "--horizon", "14", "--lambda", "0.9", "sales")
	if err != nil {
		t.Fatalf("alter: %v\n%s", err, out)
	}
	for _, w := range []string{`tracker "sales" changed: horizon 10 -> 14, lambda 0.95 -> 0.9`, "replays its 2 series"} {
		if !strings.Contains(out, w) {
			t.Errorf("alter printed %q, want %q", out, w)
		}
	}
	if out, err := runCLI(t, ctx, "run", "--db", url, "--once"); err != nil {
		t.Fatalf("run --once: %v\n%s", err, out)
	}
	var n int
	if err := pool.QueryRow(ctx, `SELECT count(*) FROM sidetrend.forecasts WHERE tracker = 'sales' AND series_key = 'north'`).Scan(&n); err != nil || n != 14 {
		t.Errorf("%d forecast rows for north after alter --horizon 14 (err %v), want 14", n, err)
	}
	for _, c := range []struct {
		args []string
		want string
	}{
		{[]string{"alter", "--db", url, "--degree", "9", "sales"}, "HINT: Use a polynomial degree from 0 to 3"},
		{[]string{"alter", "--db", url, "sales"}, "nothing to change"},
		{[]string{"alter", "--db", url, "--horizon", "3"}, "sidetrend alter NAME"},
		{[]string{"alter", "--db", url, "--lambda", "most", "sales"}, `--lambda "most" is not a number`},
	} {
		if _, err := runCLI(t, ctx, c.args...); err == nil || !strings.Contains(err.Error(), c.want) {
			t.Errorf("%v: %v, want %q", c.args, err, c.want)
		}
	}
}

// TestTransformFlags: sidetrend track --transform log makes a log tracker,
// sidetrend alter --transform none turns it back, and an unknown transform
// gets the function's hint.
func TestTransformFlags(t *testing.T) {
	url, pool := salesDB(t)
	ctx := context.Background()
	out, err := runCLI(t, ctx, "track", "--db", url, "--table", "public.sales", "--time", "sold_at", "--value", "amount",
		"--name", "sales_log", "--transform", "log")
	if err != nil {
		t.Fatalf("track --transform log: %v\n%s", err, out)
	}
	var transform, empty string
	if err := pool.QueryRow(ctx, `SELECT transform, empty FROM sidetrend.tracker_settings WHERE tracker = 'sales_log'`).Scan(&transform, &empty); err != nil {
		t.Fatal(err)
	}
	if transform != "log" || empty != "gap" {
		t.Errorf("transform %q, empty %q; want log and gap", transform, empty)
	}
	out, err = runCLI(t, ctx, "alter", "--db", url, "--transform", "none", "sales_log")
	if err != nil || !strings.Contains(out, "transform log -> none") {
		t.Errorf("alter --transform none: %v\n%s", err, out)
	}
	if _, err := runCLI(t, ctx, "track", "--db", url, "--table", "public.sales", "--time", "sold_at", "--value", "amount",
		"--name", "x", "--transform", "ln"); err == nil || !strings.Contains(err.Error(), "transform => 'log'") {
		t.Errorf("track --transform ln: %v, want the hint", err)
	}
}
