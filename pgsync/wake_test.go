package pgsync

import (
	"context"
	"sync/atomic"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"
)

// TestWakeWithoutNotify: while a sidecar holds the lease in sidetrend.wake,
// capture statements send no notification, and the sidecar still folds
// their changes by reading the log itself; once the lease has run out, a
// capture statement notifies, and a sleeping sidecar wakes on it. The poll
// timer is an hour, so only these two ways can fold a change here.
// (A lease left by a sidecar that died while awake runs out within
// leaseFor; another, sleeping sidecar finds the changes written under it
// at its next poll.)
func TestWakeWithoutNotify(t *testing.T) {
	t.Parallel()
	pool, url := newDB(t)
	ctx := context.Background()
	exec(t, pool, `CREATE TABLE kiosk (at timestamptz, v float8)`)
	exec(t, pool, `SELECT sidetrend.track('kiosk', 'at', 'v', degree => 0, horizon => 2)`)

	listener, err := pgx.Connect(ctx, url)
	if err != nil {
		t.Fatal(err)
	}
	defer listener.Close(ctx)
	if _, err := listener.Exec(ctx, `LISTEN `+pgx.Identifier{Channel}.Sanitize()); err != nil {
		t.Fatal(err)
	}
	// notifications counts what arrives until none has for quiet (a busy
	// machine can take its time to forward one).
	notifications := func(quiet time.Duration) int {
		n := 0
		for {
			wait, cancel := context.WithTimeout(ctx, quiet)
			_, err := listener.WaitForNotification(wait)
			cancel()
			if err != nil {
				return n
			}
			n++
		}
	}

	var drained atomic.Int64
	caught := make(chan struct{}, 1)
	r := NewRunner(url, RunnerConfig{Poll: time.Hour, TuneEvery: -1, OnCaughtUp: func(s Stats) {
		drained.Store(s.Changes)
		select {
		case caught <- struct{}{}:
		default:
		}
	}}, nil)
	if err := r.Start(ctx); err != nil {
		t.Fatal(err)
	}
	defer r.Stop()
	waitDrained := func(want int64, what string) {
		t.Helper()
		deadline := time.After(30 * time.Second)
		for drained.Load() < want {
			select {
			case <-caught:
			case <-deadline:
				t.Fatalf("%s: %d changes drained after 30 s, want %d", what, drained.Load(), want)
			}
		}
	}
	<-caught
	notifications(time.Second)

	// While the sidecar is awake it holds the lease, and a capture
	// statement that sees it sends no notification; the sidecar folds the
	// change by itself all the same. Each insert reads the lease in its own
	// transaction first, so the test knows which ones may notify (on a busy
	// machine the sidecar can go to sleep between two of them).
	underLease, expired := 0, 0
	for i := 1; i <= 6; i++ {
		tx, err := pool.Begin(ctx)
		if err != nil {
			t.Fatal(err)
		}
		var held bool
		if err := tx.QueryRow(ctx, `SELECT awake_until > clock_timestamp() + interval '100 ms' FROM sidetrend.wake`).Scan(&held); err != nil {
			t.Fatal(err)
		}
		if _, err := tx.Exec(ctx, `INSERT INTO kiosk VALUES ($1, 1)`, time.Now().Add(-time.Duration(i)*24*time.Hour)); err != nil {
			t.Fatal(err)
		}
		if err := tx.Commit(ctx); err != nil {
			t.Fatal(err)
		}
		if held {
			underLease++
		} else {
			expired++
		}
		waitDrained(int64(i), "while awake")
	}
	if n := notifications(2 * time.Second); n > expired {
		t.Errorf("%d notifications for %d inserts under the lease and %d after it, want at most %d", n, underLease, expired, expired)
	}
	if underLease == 0 {
		t.Logf("no insert saw the lease held (a very busy machine): only the folding was checked")
	}

	// The lease run out: a capture statement notifies and wakes the
	// sidecar, asleep by now (it has waited for the lease to run out and
	// for the transactions that could have seen it).
	// Wait until the sidecar let the lease run out (it may have renewed it
	// once more), and for it to settle.
	for {
		var held bool
		if err := pool.QueryRow(ctx, `SELECT awake_until > clock_timestamp() FROM sidetrend.wake`).Scan(&held); err != nil {
			t.Fatal(err)
		}
		if !held {
			break
		}
		time.Sleep(50 * time.Millisecond)
	}
	time.Sleep(4 * idleAfter)
	notifications(time.Second)
	exec(t, pool, `INSERT INTO kiosk VALUES ($1, 1)`, time.Now().Add(-9*24*time.Hour))
	waitDrained(7, "after the lease ran out")
	if n := notifications(5 * time.Second); n < 1 {
		t.Errorf("%d notifications after the lease ran out, want at least 1", n)
	}
}

// TestSpread: the background tuning's sample keeps the order and spreads
// over the whole list.
func TestSpread(t *testing.T) {
	if got := spread([]int{0, 1, 2, 3, 4, 5, 6, 7, 8, 9}, 3); len(got) != 3 || got[0] != 0 || got[1] != 3 || got[2] != 6 {
		t.Errorf("spread of 10 into 3: %v, want [0 3 6]", got)
	}
	if got := spread([]int{1, 2}, 3); len(got) != 2 {
		t.Errorf("spread of 2 into 3: %v, want both", got)
	}
}
