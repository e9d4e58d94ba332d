package pgsync

import (
	"bytes"
	"context"
	"fmt"
	"log/slog"
	"math"
	"math/rand/v2"
	"os"
	osexec "os/exec"
	"path/filepath"
	"strings"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"github.com/jackc/pgx/v5/pgxpool"

	"github.com/sidetrend/sidetrend/pglocal"
)

// crashScale is the size of the crash tests: a short form under `make
// test`, the full one under `make test-long` (SIDETREND_LONG=1).
type crashScale struct {
	rows, series, kills, restarts int
}

func scale() crashScale {
	if os.Getenv("SIDETREND_LONG") != "" {
		return crashScale{rows: 200000, series: 500, kills: 24, restarts: 6}
	}
	return crashScale{rows: 20000, series: 100, kills: 4, restarts: 2}
}

// loader inserts rows in many transactions of random size, with times
// spread over 60 days in random order (so many rows are late), until
// total rows are in. It retries a transaction that failed (the server may be
// restarting); whether a failed commit landed does not matter, because the
// reference is computed from the table itself.
func loader(ctx context.Context, pool *pgxpool.Pool, rng *rand.Rand, total, series int, inserted *atomic.Int64) error {
	start := time.Date(2026, 3, 1, 0, 0, 0, 0, time.UTC)
	for inserted.Load() < int64(total) {
		if ctx.Err() != nil {
			return ctx.Err()
		}
		n := min(1+rng.IntN(200), total-int(inserted.Load()))
		var sb strings.Builder
		args := make([]any, 0, 3*n)
		sb.WriteString("INSERT INTO obs (at, k, v) VALUES ")
		for i := 0; i < n; i++ {
			if i > 0 {
				sb.WriteString(", ")
			}
			fmt.Fprintf(&sb, "($%d, $%d, $%d)", 3*i+1, 3*i+2, 3*i+3)
			d := rng.IntN(60)
			s := rng.IntN(series)
			at := start.Add(time.Duration(d)*24*time.Hour + time.Duration(rng.IntN(86400))*time.Second)
			v := math.Round((100+float64(s)+0.5*float64(d)+5*rng.NormFloat64())*100) / 100
			args = append(args, at, fmt.Sprintf("s%03d", s), v)
		}
		for attempt := 0; ; attempt++ {
			_, err := pool.Exec(ctx, sb.String(), args...)
			if err == nil {
				break
			}
			if ctx.Err() != nil || attempt > 200 {
				return fmt.Errorf("loader: %w", err)
			}
			time.Sleep(50 * time.Millisecond) // the server is restarting: back off, then try again
		}
		inserted.Add(int64(n))
	}
	return nil
}

// buildBinary builds the sidetrend command once per test binary.
var buildOnce struct {
	sync.Once
	path string
	err  error
}

func sidetrendBinary(t *testing.T) string {
	t.Helper()
	buildOnce.Do(func() {
		dir, err := os.MkdirTemp("", "sidetrend-bin-")
		if err != nil {
			buildOnce.err = err
			return
		}
		buildOnce.path = filepath.Join(dir, "sidetrend")
		out, err := osexec.Command("go", "build", "-o", buildOnce.path, "github.com/sidetrend/sidetrend/cmd/sidetrend").CombinedOutput()
		if err != nil {
			buildOnce.err = fmt.Errorf("go build: %v\n%s", err, out)
		}
	})
	if buildOnce.err != nil {
		t.Fatal(buildOnce.err)
	}
	return buildOnce.path
}

// TestKillNineLosesNothing kills `sidetrend run` with SIGKILL at random
// moments while a loader writes, restarts it each time, and checks at the
// end that the states equal a fresh fit and the change log is empty.
func TestKillNineLosesNothing(t *testing.T) {
	t.Parallel()
	sc := scale()
	bin := sidetrendBinary(t)
	pool, url := newDB(t)
	ctx := context.Background()
	exec(t, pool, `CREATE TABLE obs (id bigserial PRIMARY KEY, at timestamptz, k text, v float8)`)
	exec(t, pool, `SELECT sidetrend.track('obs', 'at', 'v', '{k}', lambda => 0.9, horizon => 5, name => 'obs')`)
	logPath := filepath.Join(t.TempDir(), "run.log")
	logFile, err := os.Create(logPath)
	if err != nil {
		t.Fatal(err)
	}
	defer logFile.Close()
	startRun := func() *osexec.Cmd {
		cmd := osexec.Command(bin, "run", "--db", url, "--poll", "200ms", "--migrate=false")
		cmd.Stdout, cmd.Stderr = logFile, logFile
		if err := cmd.Start(); err != nil {
			t.Fatal(err)
		}
		return cmd
	}
	rng := rand.New(rand.NewPCG(11, 11))
	var inserted atomic.Int64
	loadCtx, cancel := context.WithCancel(ctx)
	defer cancel()
	loadErr := make(chan error, 1)
	go func() { loadErr <- loader(loadCtx, pool, rand.New(rand.NewPCG(12, 12)), sc.rows, sc.series, &inserted) }()

	kills := 0
	cmd := startRun()
	loading := true
	for loading || kills < sc.kills {
		select {
		case err := <-loadErr:
			if err != nil {
				t.Fatal(err)
			}
			loading = false
		case <-time.After(time.Duration(100+rng.IntN(600)) * time.Millisecond):
		}
		// SIGKILL: no chance to clean up, whatever the sidecar was doing.
		if err := cmd.Process.Kill(); err != nil {
			t.Fatal(err)
		}
		cmd.Wait()
		kills++
		cmd = startRun()
	}
	cmd.Process.Kill()
	cmd.Wait()
	once := osexec.Command(bin, "run", "--once", "--db", url, "--migrate=false")
	if out, err := once.CombinedOutput(); err != nil {
		t.Fatalf("run --once: %v\n%s", err, out)
	}
	var left, rows, seriesN int
	if err := pool.QueryRow(ctx, `SELECT (SELECT count(*) FROM sidetrend.changes), (SELECT count(*) FROM obs), (SELECT count(*) FROM sidetrend.series)`).Scan(&left, &rows, &seriesN); err != nil {
		t.Fatal(err)
	}
	if left != 0 {
		t.Errorf("change log holds %d rows after run --once", left)
	}
	r := obsTracker("obs", "sum", "zero")
	compareAll(t, pool, r, referenceFit(t, pool, r), "after SIGKILLs")
	t.Logf("checked: %d rows across %d series, %d SIGKILLs of sidetrend run, change log empty: %v", rows, seriesN, kills, left == 0)
	if t.Failed() {
		out, _ := os.ReadFile(logPath)
		t.Logf("sidecar log tail:\n%s", tail(string(out), 30))
	}
}

// lockedBuffer is a bytes.Buffer safe for the logger's goroutine and ours.
type lockedBuffer struct {
	mu  sync.Mutex
	buf bytes.Buffer
}

func (b *lockedBuffer) Write(p []byte) (int, error) {
	b.mu.Lock()
	defer b.mu.Unlock()
	return b.buf.Write(p)
}

func (b *lockedBuffer) String() string {
	b.mu.Lock()
	defer b.mu.Unlock()
	return b.buf.String()
}

func tail(s string, n int) string {
	lines := strings.Split(strings.TrimRight(s, "\n"), "\n")
	if len(lines) > n {
		lines = lines[len(lines)-n:]
	}
	return strings.Join(lines, "\n")
}

// TestPostgresRestartsUnderLoad restarts Postgres itself, fast and
// immediate shutdowns in turn, while the loader writes and an in-process
// sidecar runs; the sidecar reconnects by itself and nothing is lost. It
// runs its own private server, since restarting the shared one would break
// the other tests.
func TestPostgresRestartsUnderLoad(t *testing.T) {
	sc := scale()
	ctx := context.Background()
	srv, err := pglocal.Start(ctx, pglocal.Config{Settings: map[string]string{"fsync": "off"}})
	if err != nil {
		t.Fatal(err)
	}
	defer srv.Stop(context.WithoutCancel(ctx))
	url := srv.URL("postgres")
	if _, err := Migrate(ctx, url, nil); err != nil {
		t.Fatal(err)
	}
	pool, err := Connect(ctx, url)
	if err != nil {
		t.Fatal(err)
	}
	defer pool.Close()
	exec(t, pool, `CREATE TABLE obs (id bigserial PRIMARY KEY, at timestamptz, k text, v float8)`)
	exec(t, pool, `SELECT sidetrend.track('obs', 'at', 'v', '{k}', lambda => 0.9, horizon => 5, name => 'obs')`)

	caught := make(chan Stats, 1)
	var sessionErrors atomic.Int64
	var logBuf lockedBuffer
	defer func() {
		if t.Failed() {
			t.Logf("sidecar log tail:\n%s", tail(logBuf.String(), 40))
		}
	}()
	runner := NewRunner(url, RunnerConfig{
		Poll: 200 * time.Millisecond,
		OnCaughtUp: func(s Stats) {
			select {
			case caught <- s:
			default:
			}
		},
		OnSessionError: func(error) { sessionErrors.Add(1) },
	}, slog.New(slog.NewTextHandler(&logBuf, nil)))
	if err := runner.Start(ctx); err != nil {
		t.Fatal(err)
	}
	defer runner.Stop()

	var inserted atomic.Int64
	loadErr := make(chan error, 1)
	go func() { loadErr <- loader(ctx, pool, rand.New(rand.NewPCG(21, 21)), sc.rows, sc.series, &inserted) }()
	rng := rand.New(rand.NewPCG(22, 22))
	modes := []string{"fast", "immediate"}
	for i := 0; i < sc.restarts; i++ {
		time.Sleep(time.Duration(200+rng.IntN(500)) * time.Millisecond) // let load and drain run for a while
		if err := srv.Restart(ctx, modes[i%2]); err != nil {
			t.Fatalf("restart %s: %v", modes[i%2], err)
		}
	}
	if err := <-loadErr; err != nil {
		t.Fatal(err)
	}
	// Wait until the sidecar, by itself, has caught up with everything.
	deadline := time.After(10 * time.Minute)
	for {
		var left int
		select {
		case <-caught:
		case <-time.After(10 * time.Second):
			pool.QueryRow(ctx, `SELECT count(*) FROM sidetrend.changes`).Scan(&left)
			t.Logf("waiting for the sidecar: %d changes left", left)
			continue
		case <-deadline:
			t.Fatal("sidecar did not catch up within 10 minutes after the restarts")
		}
		if err := pool.QueryRow(ctx, `SELECT count(*) FROM sidetrend.changes`).Scan(&left); err == nil && left == 0 {
			break
		}
	}
	runner.Stop()
	r := obsTracker("obs", "sum", "zero")
	compareAll(t, pool, r, referenceFit(t, pool, r), "after Postgres restarts")
	var rows int
	pool.QueryRow(ctx, `SELECT count(*) FROM obs`).Scan(&rows)
	t.Logf("checked: %d rows, %d Postgres restarts (fast and immediate), %d sidecar reconnects", rows, sc.restarts, sessionErrors.Load())
	if sessionErrors.Load() == 0 {
		t.Errorf("the sidecar never saw its connection drop: the restarts did not test reconnection")
	}
}
