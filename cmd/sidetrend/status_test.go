package main

import (
	"context"
	"encoding/json"
	"strings"
	"testing"

	"github.com/sidetrend/sidetrend/pgsync"
)

func TestStatus(t *testing.T) {
	url, pool := salesDB(t)
	ctx := context.Background()
	// One reject (a NULL amount), one change left in the log (the sidecar
	// is not running), and a series error as a failed fold leaves it.
	for _, sql := range []string{
		`INSERT INTO public.sales VALUES ('north', '2025-05-20', NULL)`,
		`INSERT INTO public.sales VALUES ('south', '2025-05-20', 140)`,
		`UPDATE sidetrend.series SET last_error = 'bucket 9000: value too large', error_at = now(), failed = true WHERE series_key = 'south'`,
	} {
		if _, err := pool.Exec(ctx, sql); err != nil {
			t.Fatalf("%s: %v", sql, err)
		}
	}

	lag, err := pgsync.LoadLag(ctx, pool)
	if err != nil {
		t.Fatal(err)
	}
	if lag.OldestChange <= 0 || lag.Rejects != 1 {
		t.Errorf("LoadLag = %+v, want a positive age and 1 reject", lag)
	}

	out, err := runCLI(t, ctx, "status", "--db", url, "--format", "json")
	if err != nil {
		t.Fatalf("status: %v\n%s", err, out)
	}
	var doc map[string]any
	if err := json.Unmarshal([]byte(out), &doc); err != nil {
		t.Fatalf("status --format json is not JSON: %v\n%s", err, out)
	}
	for _, k := range []string{"at", "trackers", "pending_changes", "lag_seconds", "rejects", "series", "ready_series", "warming_series", "series_with_error"} {
		if _, ok := doc[k]; !ok {
			t.Errorf("status JSON lacks %q", k)
		}
	}
	trackers, _ := doc["trackers"].([]any)
	if len(trackers) != 1 {
		t.Fatalf("status JSON has %d trackers, want 1:\n%s", len(trackers), out)
	}
	tr := trackers[0].(map[string]any)
	for _, k := range []string{"name", "source", "bucket", "model", "status", "backfilled", "ready", "warming",
		"pending_changes", "lag_seconds", "rejects", "last_error", "last_series_error"} {
		if _, ok := tr[k]; !ok {
			t.Errorf("tracker JSON lacks %q", k)
		}
	}
	want := map[string]any{
		"name": "sales", "source": "public.sales", "bucket": "1 day", "status": "active", "backfilled": true,
		"model": "linear trend + period 7 (1 harmonic), lambda 0.95",
		// Two shops, both past warm-up; one row waiting; one NULL amount.
		"ready": 2.0, "warming": 0.0, "pending_changes": 1.0, "rejects": 1.0,
	}
	for k, v := range want {
		if tr[k] != v {
			t.Errorf("tracker %s = %v, want %v", k, tr[k], v)
		}
	}
	if lag, _ := tr["lag_seconds"].(float64); lag <= 0 {
		t.Errorf("lag_seconds %v with a change waiting, want > 0", tr["lag_seconds"])
	}
	se, _ := tr["last_series_error"].(map[string]any)
	if se["series_key"] != "south" || se["error"] != "bucket 9000: value too large" {
		t.Errorf("last_series_error %v, want south's", tr["last_series_error"])
	}

	out, err = runCLI(t, ctx, "status", "--db", url)
	if err != nil {
		t.Fatalf("status: %v\n%s", err, out)
	}
	t.Logf("status:\n%s", out)
	for _, s := range []string{"1 trackers, 2 series (2 ready, 0 warming), 1 pending changes", "tracker  source", "sales    public.sales",
		"Last errors:", `sales, series "south"`, "value too large"} {
		if !strings.Contains(out, s) {
			t.Errorf("status table lacks %q:\n%s", s, out)
		}
	}

	for _, s := range []string{"Series in error:", "series_key", `"south"`, "failed", "UTC: bucket 9000: value too large"} {
		if !strings.Contains(out, s) {
			t.Errorf("status table lacks %q in the series in error:\n%s", s, out)
		}
	}
	if tr["series_failed"] != 1.0 {
		t.Errorf("series_failed %v, want 1", tr["series_failed"])
	}

	// --series lists every series key with its state.
	out, err = runCLI(t, ctx, "status", "--db", url, "--series", "--tracker", "sales")
	if err != nil {
		t.Fatalf("status --series: %v\n%s", err, out)
	}
	t.Logf("status --series:\n%s", out)
	for _, s := range []string{`"north"`, "ready", `"south"`, "failed", "folded_through"} {
		if !strings.Contains(out, s) {
			t.Errorf("status --series lacks %q:\n%s", s, out)
		}
	}
	out, err = runCLI(t, ctx, "status", "--db", url, "--series", "--limit", "1", "--format", "json")
	if err != nil || !strings.Contains(out, `"north"`) || strings.Contains(out, `"south"`) || !strings.Contains(out, `"more": true`) {
		t.Errorf("status --series --limit 1 --format json: %v\n%s", err, out)
	}
	if _, err := runCLI(t, ctx, "status", "--db", url, "--series", "--tracker", "nope"); err == nil || !strings.Contains(err.Error(), `no tracker named "nope"`) {
		t.Errorf("status --series --tracker nope: %v, want no tracker named", err)
	}

	if _, err := runCLI(t, ctx, "status", "--db", url, "--format", "yaml"); err == nil || !strings.Contains(err.Error(), "use table or json") {
		t.Errorf("status --format yaml: %v, want an error naming table and json", err)
	}
}
