package pgsync

import (
	"context"
	"errors"
	"fmt"
	"log/slog"
	"math/rand/v2"
	"sync"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgxpool"
)

// Channel is the NOTIFY channel the capture triggers wake the sidecar on.
const Channel = "sidetrend"

// parseConfig reads a connection string; an empty one means the standard
// PG* environment variables (PGHOST, PGPORT, PGDATABASE, PGUSER, ...).
func parseConfig(dbURL string) (*pgxpool.Config, error) {
	cfg, err := pgxpool.ParseConfig(dbURL)
	if err != nil {
		return nil, fmt.Errorf("database connection string: %w", err)
	}
	if cfg.ConnConfig.RuntimeParams == nil {
		cfg.ConnConfig.RuntimeParams = map[string]string{}
	}
	if _, ok := cfg.ConnConfig.RuntimeParams["application_name"]; !ok {
		cfg.ConnConfig.RuntimeParams["application_name"] = "sidetrend"
	}
	return cfg, nil
}

// Connect opens a pool on dbURL (empty: PG* environment variables).
func Connect(ctx context.Context, dbURL string) (*pgxpool.Pool, error) {
	cfg, err := parseConfig(dbURL)
	if err != nil {
		return nil, err
	}
	cfg.AfterConnect = registerCodecs
	pool, err := pgxpool.NewWithConfig(ctx, cfg)
	if err != nil {
		return nil, fmt.Errorf("connect: %w", err)
	}
	return pool, nil
}

// RunnerConfig tunes the sidecar loop.
type RunnerConfig struct {
	// Poll is the fallback interval at which the change log is read even
	// without a notification (NOTIFY is only a wake-up). Jittered by +-20 %.
	Poll time.Duration
	// OnCaughtUp, if set, is called after every catch-up that found the log
	// empty: tests wait on it instead of sleeping.
	OnCaughtUp func(Stats)
	// Workers and BatchSize are handed to the Syncer (0: its defaults).
	Workers   int
	BatchSize int
	// LockTimeout is handed to the Syncer (0: DefaultLockTimeout).
	LockTimeout time.Duration
	// OnBatch and Progress are handed to the Syncer (metrics, progress bars).
	OnBatch  func(BatchInfo)
	Progress Progress
	// OnSessionError, if set, is told why a session ended (before the
	// reconnect backoff): metrics and health checks use it.
	OnSessionError func(error)
	// TuneEvery is how often the background tuner looks for trackers to
	// tune (new backfills, requests, results older than a day); 0 means
	// every minute, negative turns it off.
	TuneEvery time.Duration
}

// Runner is the long-lived sidecar: it LISTENs, catches up from the change
// log first and after every reconnect, drains on every notification and on
// a slow timer, and reconnects with backoff when Postgres goes away.
type Runner struct {
	dbURL string
	cfg   RunnerConfig
	log   *slog.Logger

	mu      sync.Mutex
	cancel  context.CancelFunc
	done    chan struct{}
	lastErr error
}

// NewRunner returns a Runner for the database at dbURL.
func NewRunner(dbURL string, cfg RunnerConfig, log *slog.Logger) *Runner {
	if cfg.Poll <= 0 {
		cfg.Poll = 5 * time.Second
	}
	if log == nil {
		log = slog.New(slog.DiscardHandler)
	}
	return &Runner{dbURL: dbURL, cfg: cfg, log: log}
}

// Start connects once (failing fast on a bad address or credentials) and
// then runs the loop in the background until Stop or ctx ends.
func (r *Runner) Start(ctx context.Context) error {
	r.mu.Lock()
	defer r.mu.Unlock()
	if r.done != nil {
		return errors.New("pgsync: runner already started")
	}
	pool, err := Connect(ctx, r.dbURL)
	if err != nil {
		return err
	}
	if err := pool.Ping(ctx); err != nil {
		pool.Close()
		return fmt.Errorf("connect: %w", err)
	}
	ctx, cancel := context.WithCancel(ctx)
	r.cancel, r.done = cancel, make(chan struct{})
	go func() {
		defer close(r.done)
		defer pool.Close()
		var wg sync.WaitGroup
		if r.cfg.TuneEvery >= 0 {
			wg.Add(1)
			go func() {
				defer wg.Done()
				r.tuner(ctx, pool)
			}()
		}
		r.loop(ctx, pool)
		wg.Wait()
	}()
	return nil
}

// Stop ends the loop and waits for it; it is safe to call more than once.
func (r *Runner) Stop() {
	r.mu.Lock()
	cancel, done := r.cancel, r.done
	r.mu.Unlock()
	if cancel == nil {
		return
	}
	cancel()
	<-done
}

// Done is closed when the loop has ended.
func (r *Runner) Done() <-chan struct{} {
	r.mu.Lock()
	defer r.mu.Unlock()
	return r.done
}

func (r *Runner) loop(ctx context.Context, pool *pgxpool.Pool) {
	syncer := NewSyncer(pool, r.log)
	syncer.OnBatch, syncer.Progress = r.cfg.OnBatch, r.cfg.Progress
	if r.cfg.Workers > 0 {
		syncer.Workers = r.cfg.Workers
	}
	syncer.LockTimeout = r.cfg.LockTimeout
	if r.cfg.BatchSize > 0 {
		syncer.BatchSize = r.cfg.BatchSize
	}
	backoff := 100 * time.Millisecond
	for ctx.Err() == nil {
		err := r.session(ctx, pool, syncer, func() { backoff = 100 * time.Millisecond })
		if ctx.Err() != nil {
			return
		}
		r.log.Warn("sidecar session ended, reconnecting", "err", err, "backoff_ms", backoff.Milliseconds())
		if r.cfg.OnSessionError != nil {
			r.cfg.OnSessionError(err)
		}
		select {
		case <-ctx.Done():
			return
		case <-time.After(jitter(backoff)):
		}
		backoff = min(backoff*2, 10*time.Second)
	}
}

// The lease (sidetrend.wake): while the sidecar is awake it keeps
// awake_until up to leaseFor ahead and reads the change log by itself,
// and capture statements skip pg_notify, whose commit-time lock capped
// notifying commits at 2-3k/s for the whole cluster. A sidecar that found
// nothing to do for idleAfter stops renewing the lease; once the lease has
// run out and every transaction that was in progress then has ended (the
// only ones that can have skipped the notification), it sleeps until
// NOTIFY or the poll timer. Until then it reads the log's head every
// fastPoll.
const (
	leaseFor  = time.Second
	idleAfter = 250 * time.Millisecond
	fastPoll  = 5 * time.Millisecond
	// coalesceFor is how long an awake sidecar lets changes gather after a
	// drain that found some, so that a stream of small commits costs one
	// drain transaction per coalesceFor, not one per commit: each drain
	// writes WAL that the source's committers flush with their own, and
	// takes CPU from them (a single-row committer ran at half its rate with
	// a drain per commit, measured with BenchmarkCommitRate).
	coalesceFor = 20 * time.Millisecond
	// settleMax bounds the wait for transactions that were in progress
	// when the lease ran out; one that commits later still is found by
	// the poll timer.
	settleMax = 10 * time.Second
	// dueEvery is how often an awake sidecar folds buckets that the clock
	// closed (a sleeping one does it on every wake-up and poll).
	dueEvery = 250 * time.Millisecond
)

const (
	leaseSQL = `UPDATE sidetrend.wake SET awake_until = greatest(awake_until, clock_timestamp() + $1::interval) RETURNING awake_until`
	// headSQL: is there any change in the log (one index probe)?
	headSQL = `SELECT EXISTS (SELECT 1 FROM sidetrend.changes ORDER BY id LIMIT 1)`
	// settleSQL: has the lease run out, and have the transactions that
	// were in progress at snapshot $2 all ended? ($2 NULL: take one now.)
	settleSQL = `SELECT clock_timestamp() > $1::timestamptz,
       coalesce($2::pg_snapshot, pg_current_snapshot())::text,
       $2::pg_snapshot IS NOT NULL AND NOT EXISTS (
           SELECT 1 FROM pg_snapshot_xip($2::pg_snapshot) x WHERE pg_xact_status(x) = 'in progress')`
)

// session holds one listening connection: LISTEN first, then catch up from
// the log, stay awake while work comes (holding the lease), then settle and
// sleep until a notification or the poll timer. It returns on any
// connection error.
func (r *Runner) session(ctx context.Context, pool *pgxpool.Pool, syncer *Syncer, healthy func()) error {
	pconn, err := pool.Acquire(ctx)
	if err != nil {
		return err
	}
	// The listening connection is not returned to the pool: it may hold
	// notifications, and after an error its state is unknown.
	conn := pconn.Hijack()
	defer conn.Close(context.WithoutCancel(ctx))
	if _, err := conn.Exec(ctx, "LISTEN "+pgx.Identifier{Channel}.Sanitize()); err != nil {
		return err
	}
	r.log.Info("listening", "channel", Channel)
	wake := true
	for {
		if wake {
			lease, err := r.renew(ctx, conn)
			if err != nil {
				return err
			}
			if err := syncer.CatchUp(ctx); err != nil {
				return err
			}
			healthy()
			if r.cfg.OnCaughtUp != nil {
				r.cfg.OnCaughtUp(syncer.Stats())
			}
			lease, notified, err := r.awake(ctx, conn, syncer, lease)
			if err != nil {
				return err
			}
			if notified {
				continue
			}
			if woken, err := r.settle(ctx, conn, lease); err != nil || woken {
				if err != nil {
					return err
				}
				continue
			}
		}
		wait, cancel := context.WithTimeout(ctx, jitter(r.cfg.Poll))
		_, err := conn.WaitForNotification(wait)
		cancel()
		if err != nil && ctx.Err() != nil {
			return ctx.Err()
		}
		if err != nil && !errors.Is(err, context.DeadlineExceeded) {
			return err
		}
		if err == nil {
			if err := drainNotifications(ctx, conn); err != nil {
				return err
			}
			wake = true
			continue
		}
		// The poll timer: a look without taking the lease (writers keep
		// notifying); only if it finds changes does the sidecar wake.
		before := syncer.Stats().Changes
		if err := syncer.CatchUp(ctx); err != nil {
			return err
		}
		healthy()
		if r.cfg.OnCaughtUp != nil {
			r.cfg.OnCaughtUp(syncer.Stats())
		}
		wake = syncer.Stats().Changes > before
	}
}

// renew sets the lease leaseFor ahead and returns when it runs out.
func (r *Runner) renew(ctx context.Context, conn *pgx.Conn) (time.Time, error) {
	var until time.Time
	if err := conn.QueryRow(ctx, leaseSQL, leaseFor).Scan(&until); err != nil {
		return until, fmt.Errorf("renew the lease: %w", err)
	}
	return until, nil
}

// awake drains as changes come, renewing the lease, until nothing has come
// for idleAfter. A notification (a new tracker, a rebuild, a tune request,
// or a writer that found the lease run out) ends it early and is reported,
// so that the caller runs a full catch-up. It returns when the lease runs
// out.
func (r *Runner) awake(ctx context.Context, conn *pgx.Conn, syncer *Syncer, lease time.Time) (time.Time, bool, error) {
	lastWork, lastDue, lastCatchUp := time.Now(), time.Now(), time.Now()
	for {
		if time.Since(lastCatchUp) >= r.cfg.Poll {
			// Trackers, checks and backfills, as a sleeping sidecar's poll does.
			if err := syncer.CatchUp(ctx); err != nil {
				return lease, false, err
			}
			lastCatchUp, lastDue = time.Now(), time.Now()
		}
		due := time.Since(lastDue) >= dueEvery
		n, err := syncer.Drain(ctx, due)
		if err != nil {
			return lease, false, err
		}
		if due {
			lastDue = time.Now()
		}
		wait := fastPoll
		if n > 0 {
			lastWork = time.Now()
			if r.cfg.OnCaughtUp != nil {
				r.cfg.OnCaughtUp(syncer.Stats())
			}
			if n < int64(max(1, syncer.BatchSize)) {
				wait = coalesceFor
			} else {
				continue // a full batch: more is waiting
			}
		}
		// Wait for the next change at the log's head.
		for {
			if time.Since(lastWork) >= idleAfter {
				return lease, false, nil
			}
			if time.Until(lease) < leaseFor/2 {
				if lease, err = r.renew(ctx, conn); err != nil {
					return lease, false, err
				}
			}
			notified, any, err := r.pause(ctx, conn, wait)
			if err != nil || notified {
				return lease, notified, err
			}
			wait = fastPoll
			if any || time.Since(lastDue) >= dueEvery {
				break
			}
		}
	}
}

// pause waits up to d for a notification; without one it reads whether the
// log holds a change. It reports a notification and a change.
func (r *Runner) pause(ctx context.Context, conn *pgx.Conn, d time.Duration) (notified, any bool, err error) {
	wait, cancel := context.WithTimeout(ctx, d)
	_, err = conn.WaitForNotification(wait)
	cancel()
	if err == nil {
		return true, false, drainNotifications(ctx, conn)
	}
	if ctx.Err() != nil {
		return false, false, ctx.Err()
	}
	if !errors.Is(err, context.DeadlineExceeded) {
		return false, false, err
	}
	if err := conn.QueryRow(ctx, headSQL).Scan(&any); err != nil {
		return false, false, fmt.Errorf("read the log's head: %w", err)
	}
	return false, any, nil
}

// settle is the way to sleep: it keeps reading the log's head, every
// fastPoll at first and less often as it waits, until the lease has run
// out and every transaction in progress at that moment has ended (or
// settleMax has passed). It reports true when a notification or a change
// woke it.
func (r *Runner) settle(ctx context.Context, conn *pgx.Conn, lease time.Time) (bool, error) {
	began, every := time.Now(), fastPoll
	var snap *string
	for time.Since(began) < settleMax {
		var expired, done bool
		var cur string
		if err := conn.QueryRow(ctx, settleSQL, lease, snap).Scan(&expired, &cur, &done); err != nil {
			return false, fmt.Errorf("wait for the lease to run out: %w", err)
		}
		if done {
			// Their changes are committed now: one last look.
			var any bool
			if err := conn.QueryRow(ctx, headSQL).Scan(&any); err != nil {
				return false, fmt.Errorf("read the log's head: %w", err)
			}
			return any, nil
		}
		if expired && snap == nil {
			snap = &cur
		}
		notified, any, err := r.pause(ctx, conn, every)
		if err != nil || notified || any {
			return notified || any, err
		}
		every = min(2*every, 100*time.Millisecond)
	}
	return false, nil
}

// drainNotifications reads whatever else arrived, so one catch-up answers
// them all.
func drainNotifications(ctx context.Context, conn *pgx.Conn) error {
	for {
		short, cancel := context.WithTimeout(ctx, time.Millisecond)
		_, err := conn.WaitForNotification(short)
		cancel()
		if err != nil {
			if ctx.Err() != nil {
				return ctx.Err()
			}
			if !errors.Is(err, context.DeadlineExceeded) {
				return err
			}
			return nil
		}
	}
}

// tuner runs the lambda searches apart from the drain, so that a long
// search never delays forecasts. Applied lambdas flag their series for a
// replay, which the drain loop's due sweep picks up.
func (r *Runner) tuner(ctx context.Context, pool *pgxpool.Pool) {
	every := r.cfg.TuneEvery
	if every == 0 {
		every = time.Minute
	}
	for {
		select {
		case <-ctx.Done():
			return
		case <-time.After(jitter(every)):
		}
		if _, _, err := TunePending(ctx, pool, 24*time.Hour, r.log); err != nil && ctx.Err() == nil {
			r.log.Warn("tuning failed", "err", err)
		}
	}
}

func jitter(d time.Duration) time.Duration {
	return time.Duration(float64(d) * (0.8 + 0.4*rand.Float64()))
}
