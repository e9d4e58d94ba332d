package pgsync

import (
	"context"
	"fmt"
	"math/rand/v2"
	"slices"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"
)

// commitRound is how long each side of one op of BenchmarkCommitRate
// writes.
const commitRound = 3 * time.Second

// BenchmarkCommitRate measures what a busy application that writes row by
// row pays for a tracked table: single-row autocommit INSERTs (prepared,
// one connection per client) into an untracked table and into a tracked one
// (200 keys, 1-minute buckets, sum), while an in-process Runner drains the
// tracked one's changes. One op is one round of commitRound on each table,
// the order alternating, so that the ratio compares like with like on a
// noisy machine. Run it with -benchtime 3x: three interleaved rounds. It
// ends by checking that every tracked row reached sidetrend.points.
func BenchmarkCommitRate(b *testing.B) {
	admin := benchServer(b)
	for _, clients := range []int{1, 4, 16} {
		b.Run(fmt.Sprintf("clients=%d", clients), func(b *testing.B) {
			pool, dbURL := newBenchDB(b, admin)
			ctx := context.Background()
			benchExec(b, pool, `CREATE TABLE plain (k int, at timestamptz DEFAULT now(), v float8)`)
			benchExec(b, pool, `CREATE TABLE tracked (k int, at timestamptz DEFAULT now(), v float8)`)
			benchExec(b, pool, `SELECT sidetrend.track('tracked', 'at', 'v', '{k}', bucket => '1 minute', horizon => 10, name => 'oltp')`)
			startBenchRunner(b, dbURL, nil)
			conns := make([]*pgx.Conn, clients)
			for i := range conns {
				c, err := pgx.Connect(ctx, dbURL)
				if err != nil {
					b.Fatal(err)
				}
				b.Cleanup(func() { c.Close(context.Background()) })
				conns[i] = c
			}
			var tx [2]int64
			var took [2]time.Duration
			n := 0
			for b.Loop() {
				for i := range 2 {
					side := (i + n) % 2 // 0 plain, 1 tracked
					table := [2]string{"plain", "tracked"}[side]
					began := time.Now()
					tx[side] += hammer(b, conns, table, commitRound)
					took[side] += time.Since(began)
				}
				n++
			}
			plain, tracked := float64(tx[0])/took[0].Seconds(), float64(tx[1])/took[1].Seconds()
			b.ReportMetric(plain, "untracked-tx/s")
			b.ReportMetric(tracked, "tracked-tx/s")
			b.ReportMetric(tracked/plain, "ratio")
			// Nothing lost: every tracked row is in a bucket point.
			deadline := time.Now().Add(benchTimeout)
			for {
				var rows, folded int64
				if err := pool.QueryRow(ctx, `SELECT (SELECT count(*) FROM tracked),
					(SELECT coalesce(sum(n), 0) FROM sidetrend.points)`).Scan(&rows, &folded); err != nil {
					b.Fatal(err)
				}
				if rows == folded {
					break
				}
				if time.Now().After(deadline) {
					b.Fatalf("%d tracked rows, %d in sidetrend.points after %s", rows, folded, benchTimeout)
				}
				time.Sleep(50 * time.Millisecond)
			}
		})
	}
}

// hammer commits single-row INSERTs into table from every connection for d
// and returns how many committed.
func hammer(b *testing.B, conns []*pgx.Conn, table string, d time.Duration) int64 {
	sql := `INSERT INTO ` + table + ` (k, v) VALUES ($1, $2)`
	var done atomic.Int64
	var wg sync.WaitGroup
	stop := time.Now().Add(d)
	errs := make(chan error, len(conns))
	for i, c := range conns {
		wg.Add(1)
		go func() {
			defer wg.Done()
			rng := rand.New(rand.NewPCG(uint64(i), 7))
			for time.Now().Before(stop) {
				if _, err := c.Exec(context.Background(), sql, rng.IntN(200), rng.Float64()); err != nil {
					errs <- err
					return
				}
				done.Add(1)
			}
		}()
	}
	wg.Wait()
	close(errs)
	for err := range errs {
		b.Fatal(err)
	}
	return done.Load()
}

// BenchmarkCommitLatency measures commit-to-forecast latency at 1,000
// single-row commits per second from 16 clients, each committing one row
// every 16 ms. The rows fall in hourly buckets long past, so a batch that
// claims a row also folds it and writes the new forecast (as in
// BenchmarkLatency). The latency of the k-th commit to complete is from
// its completion to the commit of the batch that brought the drained
// count to k: exact when the log drains in the order commits complete,
// and with 16 writers a few commits may swap places within a millisecond
// or two. One op is one commit.
func BenchmarkCommitLatency(b *testing.B) {
	admin := benchServer(b)
	b.Run("commits=1000/clients=16", func(b *testing.B) {
		const clients = 16
		pool, dbURL := newBenchDB(b, admin)
		ctx := context.Background()
		benchExec(b, pool, `CREATE TABLE meter (meter int, at timestamptz, kwh float8)`)
		benchExec(b, pool, `INSERT INTO meter SELECT m, '2001-01-01'::timestamptz + h * interval '1 hour', 5 + m + sin(h / 4.0)
			FROM generate_series(0, 199) m, generate_series(0, 47) h`)
		benchExec(b, pool, `SELECT sidetrend.track('meter', 'at', 'kwh', '{meter}', bucket => '1 hour', period => 24, harmonics => 2, horizon => 24, span => '10000 years')`)
		var mu sync.Mutex
		type drained struct {
			at    time.Time
			total int64
		}
		var batches []drained
		var total int64
		counter := newDrainCounter()
		startBenchRunner(b, dbURL, func(bi BatchInfo) {
			if bi.Changes > 0 {
				mu.Lock()
				total += int64(bi.Changes)
				batches = append(batches, drained{time.Now(), total})
				mu.Unlock()
			}
			counter.onBatch(bi)
		})
		mu.Lock()
		base := total
		mu.Unlock()
		conns := make([]*pgx.Conn, clients)
		for i := range conns {
			c, err := pgx.Connect(ctx, dbURL)
			if err != nil {
				b.Fatal(err)
			}
			b.Cleanup(func() { c.Close(context.Background()) })
			conns[i] = c
		}
		var cmu sync.Mutex
		var commits []time.Time
		var hour atomic.Int64
		hour.Store(48)
		// Each op is one commit; the clients take turns on a shared ticker
		// of 1 ms, so the rate is 1,000 commits/s whatever the client count.
		tick := time.NewTicker(time.Millisecond)
		defer tick.Stop()
		work := make(chan struct{}, clients)
		errs := make(chan error, clients)
		var wg sync.WaitGroup
		for i, c := range conns {
			wg.Add(1)
			go func() {
				defer wg.Done()
				for range work {
					h := hour.Add(1)
					_, err := c.Exec(ctx, `INSERT INTO meter VALUES ($1, '2001-01-01'::timestamptz + $2 * interval '1 hour', $3)`,
						(int(h)*clients+i)%200, h/4+48, float64(i))
					if err != nil {
						errs <- err
						return
					}
					cmu.Lock()
					commits = append(commits, time.Now())
					cmu.Unlock()
				}
			}()
		}
		b.ReportAllocs()
		for b.Loop() {
			<-tick.C
			work <- struct{}{}
		}
		close(work)
		wg.Wait()
		close(errs)
		for err := range errs {
			b.Fatal(err)
		}
		elapsed := b.Elapsed()
		counter.waitFor(b, base+int64(len(commits)))
		mu.Lock()
		defer mu.Unlock()
		slices.SortFunc(commits, func(x, y time.Time) int { return x.Compare(y) })
		lat := make([]float64, len(commits))
		j := 0
		for k, at := range commits {
			for batches[j].total < base+int64(k+1) {
				j++
			}
			lat[k] = max(0, batches[j].at.Sub(at).Seconds()*1e3)
		}
		slices.Sort(lat)
		b.ReportMetric(percentile(lat, 0.50), "p50-ms")
		b.ReportMetric(percentile(lat, 0.99), "p99-ms")
		b.ReportMetric(lat[len(lat)-1], "max-ms")
		b.ReportMetric(float64(len(commits))/elapsed.Seconds(), "commits/s")
	})
}
