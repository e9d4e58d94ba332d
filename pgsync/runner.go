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

// session holds one listening connection: LISTEN first, then catch up from
// the log, then wait for a notification or the poll timer, repeatedly. It
// returns on any connection error.
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
	for {
		if err := syncer.CatchUp(ctx); err != nil {
			return err
		}
		healthy()
		if r.cfg.OnCaughtUp != nil {
			r.cfg.OnCaughtUp(syncer.Stats())
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
		// Drain whatever else arrived so one catch-up answers them all.
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
				break
			}
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
