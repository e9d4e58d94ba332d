package main

import (
	"context"
	"image/png"
	"math"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"strconv"
	"strings"
	"syscall"
	"testing"
	"time"

	"github.com/sidetrend/sidetrend/estimator"
	"github.com/sidetrend/sidetrend/internal/pgtest"
	"github.com/sidetrend/sidetrend/pgsync"
)

// TestDemo runs the demo against the test server, shortened to one second
// of live days, and checks what it printed, what it left in the database
// and the chart.
func TestDemo(t *testing.T) {
	url := pgtest.NewDatabase(t)
	chart := filepath.Join(t.TempDir(), "demo.png")
	began := time.Now()
	out, err := runCLI(t, context.Background(), "demo", "--db", url, "--live", "1s", "--every", "250ms", "--chart", chart)
	if err != nil {
		t.Fatalf("demo: %v\n%s", err, out)
	}
	t.Logf("demo took %s", time.Since(began))
	for _, sql := range []string{demoTrackSQL, demoForecastSQL, demoSlopesSQL, demoMonthEndSQL} {
		if !strings.Contains(out, indent(sql)) {
			t.Errorf("the output does not show the SQL it ran:\n%s", sql)
		}
	}
	// 1s / 250ms = 4 live days, each a line.
	// They end yesterday (UTC).
	now := time.Now().UTC()
	yesterday := time.Date(now.Year(), now.Month(), now.Day(), 0, 0, 0, 0, time.UTC).AddDate(0, 0, -1)
	var days []string
	for i := 3; i >= 0; i-- {
		days = append(days, yesterday.AddDate(0, 0, -i).Format(time.DateOnly))
	}
	for _, day := range days {
		// new day, takings, next day, lower95, forecast, upper95, a bar
		if !regexp.MustCompile(`(?m)^` + day + ` +[0-9.]+ +\w{3} \d\d +\d+ +\d+ +\d+ \|`).MatchString(out) {
			t.Errorf("no live line for %s in:\n%s", day, out)
		}
	}
	for _, want := range []string{"decisions stay with people", "Chart of " + demoFocus + ": " + chart, "above budget", "below budget"} {
		if !strings.Contains(out, want) {
			t.Errorf("the output lacks %q:\n%s", want, out)
		}
	}

	f, err := os.Open(chart)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	img, err := png.Decode(f)
	if err != nil {
		t.Fatalf("chart: %v", err)
	}
	// The demo draws 1100 x 550 pixels (runDemo's writeChart call).
	if b := img.Bounds(); b.Dx() != 1100 || b.Dy() != 550 {
		t.Errorf("chart is %dx%d, want 1100x550", b.Dx(), b.Dy())
	}

	checkMonthEnd(t, url)
	checkNowRecipes(t, url)
}

// checkNowRecipes runs the now()-based recipes of sql/README.md on the
// demo's data, which end yesterday: next month has a forecast for each of
// its days, and the rest of this month one row per workshop.
func checkNowRecipes(t *testing.T, url string) {
	ctx := context.Background()
	pool, err := pgsync.Connect(ctx, url)
	if err != nil {
		t.Fatal(err)
	}
	defer pool.Close()
	raw, err := os.ReadFile("../../sql/README.md")
	if err != nil {
		t.Fatal(err)
	}
	var recipes []string
	for _, block := range strings.Split(string(raw), "```sql\n")[1:] {
		recipes = append(recipes, strings.SplitN(block, "```", 2)[0])
	}
	find := func(marker string) string {
		for _, r := range recipes {
			if strings.Contains(r, marker) {
				return r
			}
		}
		t.Fatalf("no recipe with %q in sql/README.md", marker)
		return ""
	}
	if _, err := pool.Exec(ctx, `SET TimeZone = 'UTC'`); err != nil {
		t.Fatal(err)
	}
	now := time.Now().UTC()
	next := time.Date(now.Year(), now.Month()+1, 1, 0, 0, 0, 0, time.UTC)
	days := next.AddDate(0, 1, 0).Sub(next).Hours() / 24
	rows, err := pool.Query(ctx, find("AS next_month"))
	if err != nil {
		t.Fatal(err)
	}
	n := 0
	for rows.Next() {
		vals, err := rows.Values()
		if err != nil {
			t.Fatal(err)
		}
		if b, _ := vals[3].(int64); float64(b) != days {
			t.Errorf("next month: %v has %v buckets, want %v", vals[1], vals[3], days)
		}
		n++
	}
	if n != len(demoBranches) {
		t.Errorf("next month: %d rows, want %d", n, len(demoBranches))
	}
	var rest int
	if err := pool.QueryRow(ctx, `SELECT count(*) FROM (`+strings.TrimSuffix(strings.TrimSpace(find("the rest of this month")), ";")+`) r`).Scan(&rest); err != nil {
		t.Fatal(err)
	}
	// The data end yesterday, so every day of this month from today on is
	// forecast (on the first of a month, all of them).
	if rest != len(demoBranches) {
		t.Errorf("rest of this month: %d rows, want %d", rest, len(demoBranches))
	}
}

// checkMonthEnd recomputes the month-end projection without the views:
// takings to date summed from the repair jobs, plus the cumulative forecast
// of the days left from each series' stored estimator state.
func checkMonthEnd(t *testing.T, url string) {
	ctx := context.Background()
	pool, err := pgsync.Connect(ctx, url)
	if err != nil {
		t.Fatal(err)
	}
	defer pool.Close()
	rows, err := pool.Query(ctx, `SELECT branch, as_of, days_left, projected FROM (`+strings.TrimSuffix(demoMonthEndSQL, ";")+`) r`)
	if err != nil {
		t.Fatal(err)
	}
	type row struct {
		branch    string
		asOf      time.Time
		daysLeft  int
		projected float64
	}
	var got []row
	for rows.Next() {
		var r row
		if err := rows.Scan(&r.branch, &r.asOf, &r.daysLeft, &r.projected); err != nil {
			t.Fatal(err)
		}
		got = append(got, r)
	}
	if err := rows.Err(); err != nil {
		t.Fatal(err)
	}
	if len(got) != len(demoBranches) {
		t.Fatalf("month-end projection has %d rows, want %d", len(got), len(demoBranches))
	}
	for _, r := range got {
		month := time.Date(r.asOf.Year(), r.asOf.Month(), 1, 0, 0, 0, 0, time.UTC)
		if want := month.AddDate(0, 1, -1).Sub(r.asOf).Hours() / 24; float64(r.daysLeft) != want {
			t.Errorf("%s: days_left %d, want %v", r.branch, r.daysLeft, want)
		}
		var toDate float64
		if err := pool.QueryRow(ctx, `SELECT sum(amount)::float8 FROM sidetrend_demo.repair_jobs
			WHERE branch = $1 AND finished_on >= $2 AND finished_on <= $3`, r.branch, month, r.asOf).Scan(&toDate); err != nil {
			t.Fatal(err)
		}
		d, err := pgsync.LoadSeries(ctx, pool, demoTracker, r.branch)
		if err != nil {
			t.Fatal(err)
		}
		st, err := estimator.UnmarshalState(d.State)
		if err != nil {
			t.Fatal(err)
		}
		want := toDate
		if r.daysLeft > 0 {
			fc, err := st.Forecast(r.daysLeft)
			if err != nil {
				t.Fatal(err)
			}
			want += fc.CumForecast[r.daysLeft-1]
		}
		// The query rounds to whole euros: half a euro either way.
		if math.Abs(r.projected-want) > 0.5 {
			t.Errorf("%s: projected %v, want to date %.2f + cumulative forecast = %.2f", r.branch, r.projected, toDate, want)
		}
	}
}

// TestDemoPrivateServer runs the demo as `make demo` does, on a private
// server, with --keep, then reaches the kept server with the printed psql
// command and stops it by the printed pid.
func TestDemoPrivateServer(t *testing.T) {
	if testing.Short() {
		t.Skip("starts a second Postgres; skipped with -short")
	}
	out, err := runCLI(t, context.Background(), "demo", "--live", "0s", "--keep", "--chart", filepath.Join(t.TempDir(), "c.png"))
	if err != nil {
		t.Fatalf("demo: %v\n%s", err, out)
	}
	stop := regexp.MustCompile(`stop: +kill -INT (\d+)`).FindStringSubmatch(out)
	psql := regexp.MustCompile(`explore: +(psql .*)`).FindStringSubmatch(out)
	dataDir := regexp.MustCompile(`keeps running \(data in (.*)\)\.`).FindStringSubmatch(out)
	if stop == nil || psql == nil || dataDir == nil {
		t.Fatalf("no psql command, pid or data directory in:\n%s", out)
	}
	for _, want := range []string{"  sidecar: sidetrend run --db 'postgres://", "  status:  sidetrend status --db 'postgres://",
		"  remove:  rm -rf " + filepath.Dir(dataDir[1])} {
		if !strings.Contains(out, want) {
			t.Errorf("demo --keep does not print %q:\n%s", want, out)
		}
	}
	pid, _ := strconv.Atoi(stop[1])
	t.Cleanup(func() {
		// The server was started by this test: stop it by its pid and wait.
		if err := syscall.Kill(pid, syscall.SIGINT); err != nil {
			t.Logf("stop the kept server: %v", err)
		}
		deadline := time.Now().Add(time.Minute)
		for syscall.Kill(pid, 0) == nil && time.Now().Before(deadline) {
			time.Sleep(50 * time.Millisecond) // polling the process with a deadline
		}
		if syscall.Kill(pid, 0) == nil {
			t.Errorf("kept server %d still runs a minute after SIGINT", pid)
		}
		os.RemoveAll(filepath.Dir(dataDir[1]))
	})
	if _, err := exec.LookPath("psql"); err != nil {
		t.Logf("psql not installed; the printed command is not tried: %s", psql[1])
		return
	}
	args := strings.Fields(psql[1])
	cmd := exec.Command(args[0], append(args[1:], "-Atc", "SELECT count(DISTINCT branch) FROM sidetrend_demo.repair_jobs")...)
	b, err := cmd.CombinedOutput()
	if err != nil {
		t.Fatalf("%s: %v\n%s", psql[1], err, b)
	}
	// Five workshops (demoBranches).
	if strings.TrimSpace(string(b)) != "5" {
		t.Errorf("psql on the kept server: %q, want 5", b)
	}
}
