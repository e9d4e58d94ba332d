package pgsync

import (
	"cmp"
	"context"
	"errors"
	"fmt"
	"log/slog"
	"maps"
	"math"
	"slices"
	"sort"
	"strconv"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgconn"
	"github.com/jackc/pgx/v5/pgxpool"
	"golang.org/x/sync/errgroup"

	"github.com/sidetrend/sidetrend/estimator"
)

// DefaultBatchSize is how many change rows one drain transaction claims
// unless Syncer.BatchSize says otherwise. Measured with the pipeline
// benchmark at 10,000 series: 5,000 drained a steady stream about 1.3x
// faster than 2,000; 8,000 was slower on a backlog (README, Performance).
const DefaultBatchSize = 5000

// claimSQL returns the statement that claims up to n change rows that no
// other sidecar holds, deletes them, folds them into sidetrend.points, and
// locks the series rows they touch, all in the caller's transaction: a crash
// before commit leaves every claimed change in the log. It returns three
// kinds of rows (column kind):
//
//   - claimPoint: a point the claim touched, with its aggregate as it now
//     stands (the upsert's RETURNING: the newest version, whoever wrote it
//     before);
//   - claimSeries: a touched series' row, locked (FOR UPDATE returns the
//     newest committed version);
//   - claimCount: one row whose n is the number of changes claimed.
//
// Locks are taken in the same order as before this statement was one:
// points first (the upsert, in key order), then series rows in key order,
// so two sidecars never wait on each other in a cycle. Returning the
// touched points spares a separate load for every series whose unfolded
// points are all among them (advance), and locking here spares a statement
// that joined the whole series table (together a fifth of a batch's time
// in Postgres, measured). n is written into the statement as a literal:
// with LIMIT $1 a generic plan may scan the whole change log.
//
// tracker, when not 0, claims only that tracker's changes (isolate uses it
// to find which tracker's changes fail).
func claimSQL(n, tracker int) string {
	only := ""
	if tracker != 0 {
		only = ` AND tracker_id = ` + strconv.Itoa(tracker)
	}
	return `
WITH claimed AS (
    DELETE FROM sidetrend.changes c
    -- ctid = ANY(ARRAY(...)) plans as a TID scan (with enable_seqscan off,
    -- see Syncer.claim); the IN form was cached as a nested-loop semi join
    -- that re-ran the LIMIT subquery per row.
    -- A tracker being backfilled holds advisory lock (21332, its id)
    -- exclusively (install_capture's backfill function): its changes are
    -- skipped until the backfill commits, and a claim that holds some is
    -- waited for by the backfill.
    WHERE c.ctid = ANY (ARRAY(SELECT ctid FROM sidetrend.changes
                              WHERE pg_try_advisory_xact_lock_shared(21332, tracker_id)` + only + `
                              ORDER BY id LIMIT ` + strconv.Itoa(n) + ` FOR UPDATE SKIP LOCKED))
    RETURNING c.tracker_id, c.series_key, c.bucket, c.n, c.sum, c.min, c.max, c.last_t, c.last_v, c.retract
), agg AS (
    SELECT tracker_id, series_key, bucket, sum(n) AS n, sum(sum) AS sum,
           min(min) FILTER (WHERE NOT retract) AS min,
           max(max) FILTER (WHERE NOT retract) AS max,
           max(last_t) FILTER (WHERE NOT retract) AS last_t,
           -- The value at the newest last_t, the greatest on a tie: the
           -- greatest float8 array [whole seconds, microseconds, value]
           -- (arrays compare element by element, and both parts of the time
           -- are exact in float8). An ordered array_agg sorted each group on
           -- its own and kept the planner from hashing the groups: a tenth
           -- of an open-bucket claim's time, measured.
           (max(ARRAY[floor(extract(epoch FROM last_t))::float8, extract(microseconds FROM last_t)::float8, last_v])
               FILTER (WHERE NOT retract AND last_t IS NOT NULL))[3] AS last_v,
           bool_or(retract) AS retract
    FROM claimed GROUP BY 1, 2, 3
), up AS (
    INSERT INTO sidetrend.points AS p (tracker_id, series_key, bucket, n, sum, min, max, last_t, last_v, dirty)
    SELECT a.tracker_id, a.series_key, a.bucket, a.n, a.sum, a.min, a.max, a.last_t, a.last_v,
           a.retract AND t.agg IN ('min', 'max', 'last')
    FROM agg a JOIN sidetrend.trackers t ON t.id = a.tracker_id
    ORDER BY 1, 2, 3
    ON CONFLICT (tracker_id, series_key, bucket) DO UPDATE SET
        n = p.n + EXCLUDED.n,
        sum = p.sum + EXCLUDED.sum,
        min = least(p.min, EXCLUDED.min),
        max = greatest(p.max, EXCLUDED.max),
        last_v = CASE WHEN p.last_t IS NULL OR EXCLUDED.last_t > p.last_t
                        OR (EXCLUDED.last_t = p.last_t AND EXCLUDED.last_v > p.last_v)
                      THEN coalesce(EXCLUDED.last_v, p.last_v) ELSE p.last_v END,
        last_t = greatest(p.last_t, EXCLUDED.last_t),
        dirty = p.dirty OR EXCLUDED.dirty
    RETURNING p.tracker_id, p.series_key, p.bucket, p.n, p.sum, p.min, p.max, p.last_v, p.dirty
), locked AS (
    SELECT s.tracker_id, s.series_key, s.folded_through, s.first_bucket, s.state, s.rebuild OR s.failed AS rebuild,
           s.lambda, s.last_direction, s.pending_due
    -- The keys are sorted, not the rows (which carry the states): a nested
    -- loop locks in the order of its outer side. (A deadlock, should a plan
    -- ever lock in another order, is retried.)
    FROM (SELECT DISTINCT tracker_id, series_key FROM up ORDER BY 1, 2) k
    JOIN sidetrend.series s ON s.tracker_id = k.tracker_id AND s.series_key = k.series_key
    FOR UPDATE OF s
)
SELECT ` + strconv.Itoa(claimPoint) + ` AS kind, tracker_id, series_key, bucket, n, sum, min, max, last_v, dirty,
       NULL::bigint, NULL::bigint, NULL::bytea, NULL::bool, NULL::float8, NULL::text, NULL::timestamptz
FROM up
UNION ALL
SELECT ` + strconv.Itoa(claimSeries) + `, tracker_id, series_key, NULL, NULL, NULL, NULL, NULL, NULL, NULL,
       folded_through, first_bucket, state, rebuild, lambda, last_direction, pending_due
FROM locked
UNION ALL
SELECT ` + strconv.Itoa(claimCount) + `, NULL, NULL, NULL, count(*), NULL, NULL, NULL, NULL, NULL,
       NULL, NULL, NULL, NULL, NULL, NULL, NULL
FROM claimed`
}

// The kinds of claimSQL's rows.
const (
	claimPoint  = 1
	claimSeries = 2
	claimCount  = 3
)

const ensureSeriesSQL = `
INSERT INTO sidetrend.series (tracker_id, series_key)
SELECT * FROM unnest($1::int[], $2::text[]) ORDER BY 1, 2
ON CONFLICT (tracker_id, series_key) DO NOTHING`

// lockSeriesSQL locks the series rows a batch will rewrite, in key order so
// that two sidecars never wait on each other in a cycle. A series whose last
// fold failed (failed, see failSeriesSQL) is replayed from all its points.
const lockSeriesSQL = `
SELECT s.tracker_id, s.series_key, s.folded_through, s.first_bucket, s.state, s.rebuild OR s.failed, s.lambda, s.last_direction, s.pending_due
FROM sidetrend.series s
JOIN unnest($1::int[], $2::text[]) AS q(tid, key) ON s.tracker_id = q.tid AND s.series_key = q.key
ORDER BY s.tracker_id, s.series_key
FOR UPDATE OF s`

// pointsSQL loads the points after a given bucket for many series at once,
// in no particular order (advance sorts each series' points: a sort here
// cost as much as the rest of the statement).
// When each bucket ends comes from the Go calendar (Tracker.bucketEnd);
// only a series flagged sql_ends (a tracker whose zone Go cannot load) gets
// it from sidetrend.bucket_start, which cost a third of this statement when
// computed for every point.
const pointsSQL = `
SELECT p.tracker_id, p.series_key, p.bucket, p.n, p.sum, p.min, p.max, p.last_v,
       CASE WHEN q.sql_ends THEN sidetrend.bucket_start(p.bucket + 1, t.bucket, t.tz) END AS ends
FROM unnest($1::int[], $2::text[], $3::bigint[], $4::bool[]) AS q(tid, key, after, sql_ends)
JOIN sidetrend.trackers t ON t.id = q.tid
-- LATERAL with OFFSET 0 keeps the index condition on all three key columns
-- even in a generic plan made while the points table was never analysed.
CROSS JOIN LATERAL (
    SELECT * FROM sidetrend.points p
    WHERE p.tracker_id = q.tid AND p.series_key = q.key AND p.bucket > q.after
    OFFSET 0) p`

// dueSQL finds series with work and no new change: a bucket whose end the
// clock (Syncer.clock) has passed, or a rebuild asked for.
const dueSQL = `
SELECT s.tracker_id, s.series_key FROM sidetrend.series s
WHERE (s.rebuild OR s.pending_due <= $1) AND ($2 = 0 OR s.tracker_id = $2)
  AND EXISTS (SELECT 1 FROM sidetrend.trackers t WHERE t.id = s.tracker_id AND t.status = 'active')
ORDER BY 1, 2 LIMIT 1000`

// helpersFrom is the smallest first batch for which drainLog starts more
// workers: a handful of changes (a quiet source, or the latency benchmark's
// 10 rows a commit) take less time than a second worker's empty claim.
const helpersFrom = 100

// DefaultWorkers is how many transactions drain the change log at once: two
// measured best on this project's 2-core benchmark machine (README); three
// measured no better on 2026-12-02, within the machine's noise.
const DefaultWorkers = 2

// Syncer drains the change log and keeps series states current. It holds no
// state between batches but a cache of trackers; it is safe for one
// goroutine at a time, and many Syncers (in many processes) may work on one
// database at once.
type Syncer struct {
	pool *pgxpool.Pool
	log  *slog.Logger
	now  func() time.Time

	trackers map[int]*Tracker
	stats    Stats

	// OnBatch, if set, is called after every committed batch, from several
	// goroutines at once when Workers > 1.
	OnBatch func(BatchInfo)
	// Workers is how many transactions drain the change log at once (see
	// drainLog); NewSyncer sets DefaultWorkers.
	Workers int
	// BatchSize is how many change rows a drain transaction claims at most;
	// NewSyncer sets DefaultBatchSize.
	BatchSize int
	// Progress, if set, is told about long work: backfills and replays.
	Progress Progress
	// DrainAll makes CatchUp also wait for changes that other transactions
	// held when it claimed (see drainLocked), so that it returns with every
	// change that was in the log when it began drained: `run --once` and
	// tests. The long-running Runner leaves them to whoever holds them.
	DrainAll bool
	// Tune makes CatchUp end with TunePending: trackers just backfilled (and
	// those asked for with sidetrend.request_tune) get their lambda search,
	// and trackers created with lambda => NULL get the result applied. The
	// long-running Runner tunes in its own goroutine instead.
	Tune bool
	// LockTimeout bounds how long a backfill (or the capture reinstall
	// before it) waits for a lock on a source table; DefaultLockTimeout
	// when zero. The backfill itself takes no lock that blocks writers.
	LockTimeout time.Duration

	// only, when not 0, limits claims and due batches to one tracker
	// (isolate).
	only int
	// lastCheck and lastPrune: when checkTrackers and pruneRejects last ran.
	lastCheck, lastPrune time.Time
}

// BatchInfo describes one committed batch.
type BatchInfo struct {
	Kind     string // "drain" (change log) or "due" (clock or rebuild request)
	Changes  int    // change rows claimed
	Series   int    // series rows written
	Rebuilds int    // series replayed from their points
	Took     time.Duration
}

// Progress receives progress of long work. Start may be called with total
// -1 when the amount is not known.
type Progress interface {
	Start(label string, total int64)
	Add(n int64)
	Done()
}

// Stats counts what a Syncer has done.
type Stats struct {
	Changes   int64 // change rows drained
	Batches   int64 // transactions committed
	Series    int64 // series states written
	Rebuilds  int64 // series replayed from their points
	Backfills int64 // trackers backfilled from their source table
	Retries   int64 // batches retried after a deadlock or serialization failure
	Failed    int64 // series set aside because their fold failed (failSeriesSQL)
	// FromClaim counts series handled with the points their claim returned
	// (see claimedSuffice), Loaded those whose points were read from
	// sidetrend.points.
	FromClaim int64
	Loaded    int64
}

func (st *Stats) add(o Stats) {
	st.Changes += o.Changes
	st.Batches += o.Batches
	st.Series += o.Series
	st.Rebuilds += o.Rebuilds
	st.Backfills += o.Backfills
	st.Retries += o.Retries
	st.Failed += o.Failed
	st.FromClaim += o.FromClaim
	st.Loaded += o.Loaded
}

// NewSyncer returns a Syncer on pool.
func NewSyncer(pool *pgxpool.Pool, log *slog.Logger) *Syncer {
	if log == nil {
		log = slog.New(slog.DiscardHandler)
	}
	return &Syncer{pool: pool, log: log, now: time.Now, Workers: DefaultWorkers, BatchSize: DefaultBatchSize}
}

// Stats returns the counts so far.
func (s *Syncer) Stats() Stats { return s.stats }

// CatchUp backfills new trackers, drains the whole change log, and folds
// every bucket that is due, until nothing is left. It is what `run --once`
// does and what `run` does on every wake-up.
func (s *Syncer) CatchUp(ctx context.Context) error {
	if err := s.refreshTrackers(ctx); err != nil {
		return err
	}
	if err := s.checkTrackers(ctx); err != nil {
		return err
	}
	if err := s.pruneRejects(ctx); err != nil {
		return err
	}
	if err := s.backfill(ctx); err != nil {
		return err
	}
	if err := s.resync(ctx); err != nil {
		return err
	}
	var mark int64
	if s.DrainAll {
		if err := s.pool.QueryRow(ctx, `SELECT coalesce(max(id), 0) FROM sidetrend.changes`).Scan(&mark); err != nil {
			return fmt.Errorf("read the change log: %w", err)
		}
	}
	if err := s.drainLog(ctx); err != nil {
		return err
	}
	if s.DrainAll {
		if err := s.drainLocked(ctx, mark); err != nil {
			return err
		}
	}
	if s.Progress != nil {
		var pending int64
		if err := s.pool.QueryRow(ctx, `SELECT count(*) FROM sidetrend.series WHERE rebuild`).Scan(&pending); err != nil {
			return fmt.Errorf("count replays: %w", err)
		}
		if pending > 0 {
			s.Progress.Start("replaying series", pending)
			defer s.Progress.Done()
		}
	}
	if err := s.drainDue(ctx); err != nil {
		return err
	}
	if !s.Tune {
		return nil
	}
	_, applied, err := TunePending(ctx, s.pool, 0, s.log)
	if err != nil {
		return err
	}
	if applied {
		return s.drainDue(ctx) // replay the series whose lambda changed
	}
	return nil
}

// Drain drains the change log until it is empty and, with due, folds the
// buckets the clock has closed: the light work of an awake sidecar between
// two catch-ups (Runner). It returns the number of changes drained.
func (s *Syncer) Drain(ctx context.Context, due bool) (int64, error) {
	if s.trackers == nil {
		if err := s.refreshTrackers(ctx); err != nil {
			return 0, err
		}
	}
	before := s.stats.Changes
	if err := s.drainLog(ctx); err != nil {
		return s.stats.Changes - before, err
	}
	if due {
		if err := s.drainDue(ctx); err != nil {
			return s.stats.Changes - before, err
		}
	}
	return s.stats.Changes - before, nil
}

// drainLog drains the change log until it is empty. When the first batch
// finds more than a handful of changes, Workers - 1 more workers drain
// beside this Syncer, each a Syncer of its own with its own connection and
// transactions, so that one worker's Go work (states and forecasts)
// overlaps another's time in Postgres: on a backlog each takes full
// batches, and on a steady stream each takes what arrived while the other
// was busy (started only for full batches, a stream was drained by one
// worker at a time: 1.4x slower with 10,000 series, measured). Their claims
// never overlap (SKIP LOCKED); a series that two batches touch is locked by
// the first and waited for by the second, which then reads the state the
// first committed.
func (s *Syncer) drainLog(ctx context.Context) error {
	n, err := s.guarded(ctx, batchDrain)
	if err != nil || n == 0 {
		return err
	}
	if n < helpersFrom || s.Workers <= 1 {
		return s.drainSerial(ctx)
	}
	g, gctx := errgroup.WithContext(ctx)
	helpers := make([]*Syncer, s.Workers-1)
	for i := range helpers {
		h := &Syncer{pool: s.pool, log: s.log, now: s.now, trackers: maps.Clone(s.trackers), OnBatch: s.OnBatch, BatchSize: s.BatchSize, only: s.only}
		helpers[i] = h
		g.Go(func() error { return h.drainSerial(gctx) })
	}
	g.Go(func() error { return s.drainSerial(gctx) })
	err = g.Wait()
	for _, h := range helpers {
		s.stats.add(h.stats)
	}
	return err
}

// drainLocked waits for the changes up to id mark that a claim skipped
// because another transaction held them, and drains them once they are
// free: a sidecar killed a moment ago can leave a transaction holding its
// claim until the server notices the lost connection; a live one commits
// its batch (and its claimed changes are gone).
func (s *Syncer) drainLocked(ctx context.Context, mark int64) error {
	wait := 20 * time.Millisecond
	for {
		var left bool
		if err := s.pool.QueryRow(ctx, `SELECT EXISTS (SELECT 1 FROM sidetrend.changes WHERE id <= $1)`, mark).Scan(&left); err != nil {
			return fmt.Errorf("read the change log: %w", err)
		}
		if !left {
			return nil
		}
		if wait >= time.Second {
			s.log.Info("waiting for changes another transaction holds (a sidecar that stopped a moment ago, or a session that locked them)", "up_to_id", mark)
		} else {
			s.log.Debug("changes held by another transaction; waiting", "wait_ms", wait.Milliseconds())
		}
		select {
		case <-ctx.Done():
			return ctx.Err()
		case <-time.After(wait):
		}
		wait = min(2*wait, time.Second)
		if err := s.drainLog(ctx); err != nil {
			return err
		}
	}
}

// drainSerial drains batches until one finds the change log empty.
//
// A batch that claimed fewer changes than it could ends it: the log was
// empty a moment ago, and an awake Runner reads the log's head before it
// claims again (an empty claim is a transaction; a look at the head is one
// index probe).
func (s *Syncer) drainSerial(ctx context.Context) error {
	for {
		n, err := s.guarded(ctx, batchDrain)
		if err != nil || n < max(1, s.BatchSize) {
			return err
		}
	}
}

func (s *Syncer) drainDue(ctx context.Context) error {
	for {
		n, err := s.guarded(ctx, batchDue)
		if err != nil {
			return err
		}
		if n == 0 {
			return nil
		}
	}
}

func (s *Syncer) refreshTrackers(ctx context.Context) error {
	ts, err := LoadTrackers(ctx, s.pool)
	if err != nil {
		return err
	}
	s.trackers = ts
	return nil
}

// backfill takes in the existing rows of every active tracker not yet
// backfilled. A tracker whose backfill fails for a reason of its own (its
// table, its columns, its rights) is set aside with the error (mark_broken)
// and the others go on.
func (s *Syncer) backfill(ctx context.Context) error {
	ids := make([]int, 0)
	for id, t := range s.trackers {
		if !t.Backfilled && t.Status == "active" {
			ids = append(ids, id)
		}
	}
	sort.Ints(ids)
	if s.Progress != nil && len(ids) > 0 {
		s.Progress.Start("backfilling trackers", int64(len(ids)))
		defer s.Progress.Done()
	}
	for _, id := range ids {
		t := s.trackers[id]
		start := time.Now()
		done, err := s.backfillOne(ctx, id)
		if err != nil && trackerFault(err) {
			if err := s.setAside(ctx, id, fmt.Errorf("backfill: %w", err)); err != nil {
				return err
			}
			continue
		}
		if err != nil {
			return fmt.Errorf("backfill tracker %q: %w", t.Name, err)
		}
		t.Backfilled = true
		if s.Progress != nil {
			s.Progress.Add(1)
		}
		if done {
			s.stats.Backfills++
			s.log.Info("backfill done", "tracker", t.Name, "took_ms", time.Since(start).Milliseconds())
		}
	}
	return nil
}

// backfillSignatureSQL tells whether a tracker's capture code was made for
// other column types than the table has now (the owner altered a column to
// another type that sidetrend reads: the capture stopped and asked for this
// backfill; check_trackers has already paused trackers with a type it does
// not read).
const backfillSignatureSQL = `
SELECT t.backfilled, t.status = 'active',
       sidetrend.column_signature(t.source, ARRAY[t.time_col, t.value_col] || t.key_cols) IS DISTINCT FROM t.col_types
FROM sidetrend.trackers t WHERE t.id = $1 FOR UPDATE`

// backfillOne backfills one tracker in one transaction, reinstalling its
// capture first when its columns changed type. It reports false when
// another sidecar had done it.
func (s *Syncer) backfillOne(ctx context.Context, id int) (bool, error) {
	tx, err := s.pool.Begin(ctx)
	if err != nil {
		return false, err
	}
	defer tx.Rollback(context.WithoutCancel(ctx))
	if _, err := tx.Exec(ctx, `SELECT set_config('lock_timeout', $1, true)`, s.lockTimeout()); err != nil {
		return false, err
	}
	// The tracker's backfill lock (see claimSQL) before its row: a drain
	// that holds the lock shared locks the row FOR SHARE (checkSettings),
	// and taking them the other way round deadlocked with it.
	if _, err := tx.Exec(ctx, `SELECT pg_advisory_xact_lock(21332, $1)`, int32(id)); err != nil {
		return false, err
	}
	// Re-check under the lock: another sidecar may have done it.
	var done, active, stale bool
	if err := tx.QueryRow(ctx, backfillSignatureSQL, id).Scan(&done, &active, &stale); err != nil {
		return false, err
	}
	if done || !active {
		return false, tx.Commit(ctx)
	}
	if stale {
		if _, err := tx.Exec(ctx, `SELECT sidetrend.install_capture($1)`, id); err != nil {
			return false, err
		}
	}
	fn := pgx.Identifier{"sidetrend", fmt.Sprintf("_backfill_%d", id)}.Sanitize()
	if _, err := tx.Exec(ctx, `SELECT `+fn+`()`); err != nil {
		return false, err
	}
	return true, tx.Commit(ctx)
}

func (s *Syncer) lockTimeout() string {
	d := s.LockTimeout
	if d <= 0 {
		d = DefaultLockTimeout
	}
	return strconv.FormatInt(d.Milliseconds(), 10) + "ms"
}

// retry runs one batch and runs it again after a deadlock or serialization
// failure, which two sidecars working on one series can cause.
func (s *Syncer) retry(ctx context.Context, batch func(context.Context) (int, error)) (int, error) {
	for attempt := 0; ; attempt++ {
		n, err := batch(ctx)
		var pgErr *pgconn.PgError
		if err != nil && attempt < 10 && errors.As(err, &pgErr) &&
			(pgErr.SQLState() == "40P01" || pgErr.SQLState() == "40001") {
			s.stats.Retries++
			s.log.Debug("batch retried", "sqlstate", pgErr.SQLState(), "attempt", attempt+1)
			continue
		}
		return n, err
	}
}

type seriesID struct {
	tracker int
	key     string
}

// drainBatch claims one batch of changes and advances the series they touch,
// in one transaction. It returns the number of changes claimed.
func (s *Syncer) drainBatch(ctx context.Context) (int, error) {
	began, before := time.Now(), s.stats
	tx, err := s.pool.Begin(ctx)
	if err != nil {
		return 0, fmt.Errorf("begin drain: %w", err)
	}
	defer tx.Rollback(context.WithoutCancel(ctx))
	c, err := s.claim(ctx, tx)
	if err != nil {
		return 0, err
	}
	if c.changes == 0 {
		return 0, nil
	}
	if err := s.recomputeDirty(ctx, tx, c.minTouched); err != nil {
		return 0, err
	}
	if err := s.advance(ctx, tx, c.minTouched, c, s.clock(c.head)); err != nil {
		return 0, err
	}
	if err := tx.Commit(ctx); err != nil {
		return 0, fmt.Errorf("commit drain: %w", err)
	}
	s.stats.Changes += c.changes
	s.stats.Batches++
	s.batchDone("drain", before, began)
	return int(c.changes), nil
}

// claimResult is what one claim found.
type claimResult struct {
	// minTouched is the oldest bucket a change touched, per series.
	minTouched map[seriesID]int64
	// points are the touched points as they now stand, per series.
	points map[seriesID][]point
	// dirty marks series with a touched point whose min, max or last must be
	// reread from the source (recomputeDirty) before it can be folded.
	dirty map[seriesID]bool
	// series are the touched series' rows, locked.
	series map[seriesID]storedSeries
	// changes is the number of change rows claimed.
	changes int64
	// head is when the oldest change left in the log was captured (nil:
	// none left), for Syncer.clock.
	head *time.Time
}

// claim runs claimSQL.
//
// The change log is a queue: its statistics, from whenever it was last
// analysed, say nothing about its size now. Planned as if empty, the claim
// scanned the whole log and compared every ctid with every claimed one
// (175 ms of a 230 ms batch, measured); with sequential scans off it takes
// the id index and a TID scan whatever the statistics say (the plan is
// cached under that setting), and it reaches the touched series rows by
// their key index instead of hashing the whole series table. The setting is
// on again for the rest of the batch; all three statements go in one round
// trip.
func (s *Syncer) claim(ctx context.Context, tx pgx.Tx) (*claimResult, error) {
	b := &pgx.Batch{}
	// The drain commits asynchronously: it only moves what the log holds
	// into points and states, in one transaction, so a commit lost in a
	// crash takes its deletions from the log with it and the changes are
	// drained again. Not waiting for the flush spares the source's writers
	// a share of the WAL flushes they queue behind.
	b.Queue(`SET LOCAL synchronous_commit = off`)
	b.Queue(`SET LOCAL enable_seqscan = off`)
	b.Queue(claimSQL(max(1, s.BatchSize), s.only))
	b.Queue(`SET LOCAL enable_seqscan = on`)
	b.Queue(logHeadSQL)
	br := tx.SendBatch(ctx, b)
	defer br.Close()
	fail := func(err error) (*claimResult, error) { return nil, fmt.Errorf("claim changes: %w", err) }
	for range 2 {
		if _, err := br.Exec(); err != nil {
			return fail(err)
		}
	}
	rows, err := br.Query()
	if err != nil {
		return fail(err)
	}
	c := &claimResult{minTouched: map[seriesID]int64{}, points: map[seriesID][]point{},
		dirty: map[seriesID]bool{}, series: map[seriesID]storedSeries{}}
	for rows.Next() {
		var kind int32
		var tid *int32
		var key *string
		var bucket, n *int64
		var p point
		var dirty *bool
		var r storedSeries
		var sum *float64
		var rebuild *bool
		if err := rows.Scan(&kind, &tid, &key, &bucket, &n, &sum, &p.min, &p.max, &p.last, &dirty,
			&r.folded, &r.first, &r.blob, &rebuild, &r.lambda, &r.lastDir, &r.pendingDue); err != nil {
			rows.Close()
			return fail(err)
		}
		switch {
		case kind == claimCount && n != nil:
			c.changes = *n
		case kind == claimPoint && tid != nil && key != nil && bucket != nil && n != nil && sum != nil && dirty != nil:
			id := seriesID{int(*tid), *key}
			p.bucket, p.n, p.sum = *bucket, *n, *sum
			c.points[id] = append(c.points[id], p)
			if m, ok := c.minTouched[id]; !ok || p.bucket < m {
				c.minTouched[id] = p.bucket
			}
			if *dirty {
				c.dirty[id] = true
			}
		case kind == claimSeries && tid != nil && key != nil && rebuild != nil:
			r.rebuild = *rebuild
			c.series[seriesID{int(*tid), *key}] = r
		default:
			rows.Close()
			return fail(fmt.Errorf("unexpected row of kind %d", kind))
		}
	}
	if err := rows.Err(); err != nil {
		return fail(err)
	}
	if _, err := br.Exec(); err != nil {
		return fail(err)
	}
	if err := br.QueryRow().Scan(&c.head); err != nil {
		return fail(err)
	}
	if err := br.Close(); err != nil {
		return fail(err)
	}
	return c, nil
}

// logHeadSQL reads when the oldest change in the log was captured (NULL if
// the log is empty). A transaction sees the changes it claimed as deleted,
// and another sidecar's claimed changes as present until that one commits.
// The head is the change with the smallest id (the id index: a scan for the
// smallest capture time would read the whole log); ids and capture times
// (transaction starts) are in the same order but for transactions that
// overlap.
const logHeadSQL = `SELECT (SELECT at FROM sidetrend.changes ORDER BY id LIMIT 1)`

// clock is the time that closes buckets: now, or, while the log still
// holds changes captured before now, the capture time of the oldest (head,
// from logHeadSQL). A bucket is folded by the clock once the clock has
// passed its end, and a sidecar that lags behind its source has not yet
// read every row of a bucket that has just ended: folding it by the wall
// clock made every row of it still in the log a late row and its series a
// replay (74,000 replays in two minutes of BenchmarkStream, measured). By
// the head's clock a bucket closes when the sidecar has read every change
// captured before its end, as it would without lag; rows stamped before
// their capture time can still arrive late, as they could without lag.
func (s *Syncer) clock(head *time.Time) time.Time {
	now := s.now()
	if head != nil && head.Before(now) {
		return *head
	}
	return now
}

// recomputeDirty rereads from the source every bucket of a min, max or last
// tracker that a delete or an update touched: those aggregates cannot be
// undone by subtraction.
func (s *Syncer) recomputeDirty(ctx context.Context, tx pgx.Tx, touched map[seriesID]int64) error {
	done := map[int]bool{}
	for id := range touched {
		t := s.trackers[id.tracker]
		if t == nil || done[id.tracker] || (t.Agg != "min" && t.Agg != "max" && t.Agg != "last") {
			continue
		}
		done[id.tracker] = true
		if _, err := tx.Exec(ctx, `SELECT sidetrend.recompute_dirty($1)`, int32(id.tracker)); err != nil {
			return fmt.Errorf("recompute buckets of tracker %q: %w", t.Name, err)
		}
	}
	return nil
}

// resync rereads single series from their source tables, as queued by
// sidetrend.rebuild(name, series_key).
func (s *Syncer) resync(ctx context.Context) error {
	for {
		tx, err := s.pool.Begin(ctx)
		if err != nil {
			return fmt.Errorf("begin resync: %w", err)
		}
		var tid int32
		var key string
		err = tx.QueryRow(ctx, `
			DELETE FROM sidetrend.resync r WHERE (r.tracker_id, r.series_key) =
			    (SELECT tracker_id, series_key FROM sidetrend.resync ORDER BY at LIMIT 1 FOR UPDATE SKIP LOCKED)
			RETURNING r.tracker_id, r.series_key`).Scan(&tid, &key)
		if errors.Is(err, pgx.ErrNoRows) {
			tx.Rollback(ctx)
			return nil
		}
		t := s.trackers[int(tid)]
		if err == nil && t != nil && t.Status == "active" {
			_, err = tx.Exec(ctx, `SELECT set_config('lock_timeout', $1, true)`, s.lockTimeout())
		}
		if err == nil && t != nil && t.Status == "active" {
			fn := pgx.Identifier{"sidetrend", fmt.Sprintf("_backfill_%d", tid)}.Sanitize()
			_, err = tx.Exec(ctx, `SELECT `+fn+`($1)`, key)
		}
		if err == nil {
			err = tx.Commit(ctx)
		}
		if err != nil {
			tx.Rollback(context.WithoutCancel(ctx))
			if tid != 0 && trackerFault(err) {
				// Its resync requests go with it (stop_capture).
				if err := s.setAside(ctx, int(tid), fmt.Errorf("rebuild series %q from its source: %w", key, err)); err != nil {
					return err
				}
				continue
			}
			return fmt.Errorf("rebuild series %q from its source: %w", key, err)
		}
		s.log.Info("series reread from source", "tracker_id", tid, "series_key", key)
	}
}

// dueBatch advances series that have no new change but a bucket the clock
// has closed, or a rebuild request.
func (s *Syncer) dueBatch(ctx context.Context) (int, error) {
	began, before := time.Now(), s.stats
	tx, err := s.pool.Begin(ctx)
	if err != nil {
		return 0, fmt.Errorf("begin due: %w", err)
	}
	defer tx.Rollback(context.WithoutCancel(ctx))
	// Asynchronous commit, as the drain's (see claim).
	if _, err := tx.Exec(ctx, `SET LOCAL synchronous_commit = off`); err != nil {
		return 0, fmt.Errorf("begin due: %w", err)
	}
	var head *time.Time
	if err := tx.QueryRow(ctx, logHeadSQL).Scan(&head); err != nil {
		return 0, fmt.Errorf("read the change log's head: %w", err)
	}
	now := s.clock(head)
	rows, err := tx.Query(ctx, dueSQL, now, int32(s.only))
	if err != nil {
		return 0, fmt.Errorf("find due series: %w", err)
	}
	due := map[seriesID]int64{}
	for rows.Next() {
		var id seriesID
		var tid int32
		if err := rows.Scan(&tid, &id.key); err != nil {
			rows.Close()
			return 0, fmt.Errorf("find due series: %w", err)
		}
		id.tracker = int(tid)
		due[id] = math.MaxInt64
	}
	if err := rows.Err(); err != nil {
		return 0, fmt.Errorf("find due series: %w", err)
	}
	if len(due) == 0 {
		return 0, nil
	}
	if err := s.refreshTrackers(ctx); err != nil {
		return 0, err
	}
	if err := s.advance(ctx, tx, due, nil, now); err != nil {
		return 0, err
	}
	if err := tx.Commit(ctx); err != nil {
		return 0, fmt.Errorf("commit due: %w", err)
	}
	s.stats.Batches++
	s.batchDone("due", before, began)
	if s.Progress != nil {
		s.Progress.Add(int64(len(due)))
	}
	return len(due), nil
}

func (s *Syncer) batchDone(kind string, before Stats, began time.Time) {
	if s.OnBatch == nil {
		return
	}
	s.OnBatch(BatchInfo{Kind: kind, Changes: int(s.stats.Changes - before.Changes),
		Series: int(s.stats.Series - before.Series), Rebuilds: int(s.stats.Rebuilds - before.Rebuilds),
		Took: time.Since(began)})
}

// seriesWork is one series being advanced in a batch.
type seriesWork struct {
	id      seriesID
	tracker *Tracker
	spec    estimator.Spec // the tracker's model, with the series' own lambda if tuned
	lambda  *float64       // the series' own lambda, nil for the tracker's

	watch      *SurpriseWatch
	oldFolded  int64 // newest folded bucket before this batch
	oldHasFold bool
	served     bool // a forecast was written
	state      *estimator.State
	folded     int64 // newest folded bucket, valid when hasFold
	hasFold    bool
	first      int64
	rebuild    bool
	points     []point
	blob       []byte // the stored state, decoded into state when needed

	oldPendingDue *time.Time // pending_due as stored
	note          *string    // why the series was replayed, kept as its last_error
	// unchanged: nothing was folded and the row as stored is still right
	// (rows that only add to a bucket still open), so it is not rewritten.
	unchanged bool
}

type point struct {
	bucket int64
	n      int64
	sum    float64
	min    *float64
	max    *float64
	last   *float64
	ends   *time.Time // only when the tracker's calendar is not in Go
}

// advance locks the given series (unless claim c locked them), loads their
// states and new points, folds every bucket that is due, and writes the
// series rows. minTouched is the oldest bucket a change touched (MaxInt64
// when none): a change at or before the newest folded bucket means the
// state is replayed from all points. now is the clock that closes buckets
// (Syncer.clock).
func (s *Syncer) advance(ctx context.Context, tx pgx.Tx, minTouched map[seriesID]int64, c *claimResult, now time.Time) error {
	if err := s.checkSettings(ctx, tx, minTouched); err != nil {
		return err
	}
	ids := make([]seriesID, 0, len(minTouched))
	for id := range minTouched {
		if _, ok := s.trackers[id.tracker]; !ok {
			if err := s.refreshTrackers(ctx); err != nil {
				return err
			}
		}
		if _, ok := s.trackers[id.tracker]; ok {
			ids = append(ids, id)
		}
	}
	sort.Slice(ids, func(i, j int) bool {
		if ids[i].tracker != ids[j].tracker {
			return ids[i].tracker < ids[j].tracker
		}
		return ids[i].key < ids[j].key
	})
	work := make(map[seriesID]*seriesWork, len(ids))
	var missing []seriesID
	if c != nil {
		for _, id := range ids {
			if r, ok := c.series[id]; ok {
				work[id] = s.newWork(id, r, minTouched[id])
			} else {
				missing = append(missing, id)
			}
		}
	} else if err := s.lockSeries(ctx, tx, ids, minTouched, work); err != nil {
		return err
	} else {
		for _, id := range ids {
			if work[id] == nil {
				missing = append(missing, id)
			}
		}
	}
	if len(missing) > 0 {
		// Series seen for the first time: create their rows, then lock
		// them. (Steady work finds every row and skips this.)
		tids, keys := seriesColumns(missing)
		if _, err := tx.Exec(ctx, ensureSeriesSQL, tids, keys); err != nil {
			return fmt.Errorf("create series rows: %w", err)
		}
		if err := s.lockSeries(ctx, tx, missing, minTouched, work); err != nil {
			return err
		}
	}

	// A series whose unfolded points are all among the claimed ones folds
	// them as the claim returned them, or, when they only add to the bucket
	// it waits for, is left as it is without decoding its state; the others
	// load their points.
	byBucket := func(a, b point) int { return cmp.Compare(a.bucket, b.bucket) }
	var load []seriesID
	for _, id := range ids {
		w := work[id]
		if w == nil {
			continue
		}
		claimed := c != nil && !c.dirty[id] && w.claimedSuffice(c.points[id])
		if claimed {
			points := c.points[id]
			if !slices.IsSortedFunc(points, byBucket) {
				slices.SortFunc(points, byBucket)
			}
			if vals, due, err := w.tracker.dueValues(points, now); err == nil && w.unchangedBy(vals, due) {
				w.unchanged = true
				s.stats.FromClaim++
				continue
			}
			w.points = points
		}
		// A state that does not decode is replayed, from all points.
		if w.decode(s.log); claimed && !w.rebuild {
			s.stats.FromClaim++
			continue
		}
		load = append(load, id)
	}
	if err := s.loadPoints(ctx, tx, load, work); err != nil {
		return err
	}
	s.stats.Loaded += int64(len(load))
	for _, id := range load {
		if w := work[id]; !slices.IsSortedFunc(w.points, byBucket) {
			slices.SortFunc(w.points, byBucket)
		}
	}

	maxH := 0
	for _, t := range s.trackers {
		maxH = max(maxH, t.Horizon)
	}
	out := newSeriesRows(len(ids), maxH)
	var goneTids []int32 // series with no point left
	var goneKeys []string
	var failTids []int32 // series whose fold failed
	var failKeys, failMsgs []string
	var surprises []Surprise
	for _, id := range ids {
		w := work[id]
		if w == nil || w.unchanged {
			continue
		}
		if w.rebuild {
			s.stats.Rebuilds++
		}
		keep, err := s.fold(w, now, out)
		if err != nil {
			var te *trackerError
			if errors.As(err, &te) {
				return &foldError{id: id, err: err}
			}
			// The error is this series' own: its row keeps its last good
			// state and forecasts, marked failed with the error, and the
			// batch goes on with the others.
			s.log.Error("series set aside: it fails to fold; the others go on", "tracker", w.tracker.Name, "series_key", id.key, "err", err)
			s.stats.Failed++
			failTids, failKeys, failMsgs = append(failTids, int32(id.tracker)), append(failKeys, id.key), append(failMsgs, err.Error())
			continue
		}
		if !keep {
			goneTids, goneKeys = append(goneTids, int32(id.tracker)), append(goneKeys, id.key)
			continue
		}
		if w.unchanged {
			continue
		}
		s.stats.Series++
		surprises = append(surprises, w.watch.Events...)
		if w.served && (!w.oldHasFold || w.folded > w.oldFolded) {
			// Forecasts are issued at folded buckets, none before the
			// series' first; until history_buckets have passed since then
			// there is nothing to prune (the prune's index probe per
			// series was a tenth of a drain's time in Postgres for young
			// series). A replay may have moved the first bucket later, and
			// a tracker keeping no history prunes all.
			out.issue(w.rebuild || w.tracker.History == 0 || w.folded-int64(w.tracker.History) >= w.first)
		}
	}
	if out.len() > 0 {
		// With sequential scans off the update finds each series row by
		// its key instead of hashing the whole series table for every
		// batch (about 5 % more rows/s at 10,000 series, measured; with
		// more series the difference can only grow).
		b := &pgx.Batch{}
		b.Queue(`SET LOCAL enable_seqscan = off`)
		b.Queue(writeSeriesSQL, out.args()...)
		b.Queue(`SET LOCAL enable_seqscan = on`)
		if err := tx.SendBatch(ctx, b).Close(); err != nil {
			return fmt.Errorf("write series: %w", err)
		}
	}
	if len(failTids) > 0 {
		if _, err := tx.Exec(ctx, failSeriesSQL, failTids, failKeys, failMsgs); err != nil {
			return fmt.Errorf("mark failed series: %w", err)
		}
	}
	if len(goneTids) > 0 {
		if _, err := tx.Exec(ctx, deleteSeriesSQL, goneTids, goneKeys); err != nil {
			return fmt.Errorf("delete empty series: %w", err)
		}
	}
	return RecordSurprises(ctx, tx, surprises)
}

// settingsSQL reads the settings versions of the trackers a batch folds and
// holds their rows FOR SHARE until it commits: sidetrend.alter_tracker,
// which updates the row, waits for batches that fold with the old settings,
// and a batch that starts after it committed sees the new version.
const settingsSQL = `SELECT id, settings_version FROM sidetrend.trackers WHERE id = ANY ($1) ORDER BY id FOR SHARE`

// checkSettings reloads the cached trackers when one of those touched was
// changed since they were read (or is not cached yet).
func (s *Syncer) checkSettings(ctx context.Context, tx pgx.Tx, touched map[seriesID]int64) error {
	seen := map[int]bool{}
	var tids []int32
	for id := range touched {
		if !seen[id.tracker] {
			seen[id.tracker] = true
			tids = append(tids, int32(id.tracker))
		}
	}
	if len(tids) == 0 {
		return nil
	}
	rows, err := tx.Query(ctx, settingsSQL, tids)
	if err != nil {
		return fmt.Errorf("read tracker settings: %w", err)
	}
	stale := false
	for rows.Next() {
		var id int32
		var version int
		if err := rows.Scan(&id, &version); err != nil {
			rows.Close()
			return fmt.Errorf("read tracker settings: %w", err)
		}
		if t := s.trackers[int(id)]; t == nil || t.Version != version {
			stale = true
		}
	}
	if err := rows.Err(); err != nil {
		return fmt.Errorf("read tracker settings: %w", err)
	}
	if stale {
		return s.refreshTrackers(ctx)
	}
	return nil
}

// seriesColumns splits ids into the parallel arrays the statements take.
func seriesColumns(ids []seriesID) ([]int32, []string) {
	tids, keys := make([]int32, len(ids)), make([]string, len(ids))
	for i, id := range ids {
		tids[i], keys[i] = int32(id.tracker), id.key
	}
	return tids, keys
}

// storedSeries is a series row as a batch reads it, locked.
type storedSeries struct {
	folded, first *int64
	blob          []byte
	rebuild       bool
	lambda        *float64
	lastDir       *string
	pendingDue    *time.Time
}

// lockSeries locks the series rows of ids that exist, decodes their states
// and adds them to work.
func (s *Syncer) lockSeries(ctx context.Context, tx pgx.Tx, ids []seriesID, minTouched map[seriesID]int64, work map[seriesID]*seriesWork) error {
	tids, keys := seriesColumns(ids)
	rows, err := tx.Query(ctx, lockSeriesSQL, tids, keys)
	if err != nil {
		return fmt.Errorf("lock series: %w", err)
	}
	for rows.Next() {
		var tid int32
		var key string
		var r storedSeries
		if err := rows.Scan(&tid, &key, &r.folded, &r.first, &r.blob, &r.rebuild, &r.lambda, &r.lastDir, &r.pendingDue); err != nil {
			rows.Close()
			return fmt.Errorf("lock series: %w", err)
		}
		id := seriesID{int(tid), key}
		work[id] = s.newWork(id, r, minTouched[id])
	}
	if err := rows.Err(); err != nil {
		return fmt.Errorf("lock series: %w", err)
	}
	return nil
}

// newWork decodes a locked series row; minTouched is the oldest bucket a
// change touched (MaxInt64 when none).
func (s *Syncer) newWork(id seriesID, r storedSeries, minTouched int64) *seriesWork {
	w := &seriesWork{id: id, tracker: s.trackers[id.tracker], rebuild: r.rebuild, lambda: r.lambda, oldPendingDue: r.pendingDue}
	w.spec = w.tracker.Spec
	if r.lambda != nil {
		w.spec.Lambda = *r.lambda // tuned for this series
	}
	if r.folded != nil {
		w.folded, w.hasFold = *r.folded, true
	}
	if r.first != nil {
		w.first = *r.first
	}
	if w.hasFold && minTouched <= w.folded {
		w.rebuild = true
	}
	// Surprises are reported for buckets folded for the first time;
	// a replay moves the slope direction but announces nothing old,
	// and a series' first fold (a backfill) announces no history.
	w.watch = &SurpriseWatch{TrackerID: id.tracker, SeriesKey: id.key, After: math.MaxInt64, Log: w.tracker.logScale()}
	if w.hasFold {
		w.watch.After = w.folded
		if r.lastDir != nil && !w.rebuild {
			w.watch.LastDirection = *r.lastDir
		}
	}
	w.oldFolded, w.oldHasFold = w.folded, w.hasFold
	w.blob = r.blob
	return w
}

// decode decodes w's stored state (a series that folded before and is not
// replayed); a state that does not decode is replaced by a replay.
func (w *seriesWork) decode(log *slog.Logger) {
	if w.rebuild || !w.hasFold || w.state != nil {
		return
	}
	st, err := estimator.DecodeFor(w.blob, w.spec)
	if err != nil {
		log.Warn("series state replaced by a replay", "tracker", w.tracker.Name, "series_key", w.id.key, "reason", err.Error())
		msg := fmt.Sprintf("the stored state did not decode (%v); replayed from the points", err)
		w.note = &msg
		w.rebuild = true
		return
	}
	w.state = st
}

// claimedSuffice reports whether the points a claim touched (after the
// newest folded bucket, as a series not replayed has them) are all of the
// series' points that can still be folded: those after the newest folded
// bucket with a value are the touched ones and, if the stored row waits
// for one (pending_due), that bucket, which must then be among them. (A
// point without rows left has no value and folds nothing.) The claim holds
// every touched point's row lock, so no other transaction can change them
// before this one commits.
func (w *seriesWork) claimedSuffice(touched []point) bool {
	if w.rebuild || !w.hasFold || w.tracker.calErr != nil || len(touched) == 0 {
		return false
	}
	if w.oldPendingDue == nil {
		return true
	}
	pending := w.tracker.cal.Index(*w.oldPendingDue) - 1
	if end, ok := w.tracker.bucketEnd(pending); !ok || !end.Equal(*w.oldPendingDue) {
		return false
	}
	for _, p := range touched {
		if p.bucket == pending {
			return true
		}
	}
	return false
}

// loadPoints loads the points of ids after their newest folded bucket (all
// of them for a replay) into work.
func (s *Syncer) loadPoints(ctx context.Context, tx pgx.Tx, ids []seriesID, work map[seriesID]*seriesWork) error {
	if len(ids) == 0 {
		return nil
	}
	tids, keys := seriesColumns(ids)
	after := make([]int64, len(ids))
	sqlEnds := make([]bool, len(ids))
	for i, id := range ids {
		w := work[id]
		after[i] = math.MinInt64
		sqlEnds[i] = w.tracker.calErr != nil
		if !w.rebuild && w.hasFold {
			after[i] = w.folded
		}
		w.points = w.points[:0]
	}
	prow, err := tx.Query(ctx, pointsSQL, tids, keys, after, sqlEnds)
	if err != nil {
		return fmt.Errorf("load points: %w", err)
	}
	for prow.Next() {
		var tid int32
		var key string
		var p point
		if err := prow.Scan(&tid, &key, &p.bucket, &p.n, &p.sum, &p.min, &p.max, &p.last, &p.ends); err != nil {
			prow.Close()
			return fmt.Errorf("load points: %w", err)
		}
		if w := work[seriesID{int(tid), key}]; w != nil {
			w.points = append(w.points, p)
		}
	}
	if err := prow.Err(); err != nil {
		return fmt.Errorf("load points: %w", err)
	}
	return nil
}

// value maps a bucket aggregate to the number the estimator sees; ok is
// false for a bucket that holds no row any more.
func (t *Tracker) value(p point) (float64, bool) {
	if p.n <= 0 {
		return 0, false
	}
	switch t.Agg {
	case "sum":
		return p.sum, true
	case "count":
		return float64(p.n), true
	case "mean":
		return p.sum / float64(p.n), true
	case "min":
		return deref(p.min)
	case "max":
		return deref(p.max)
	case "last":
		return deref(p.last)
	}
	return 0, false
}

func deref(x *float64) (float64, bool) {
	if x == nil {
		return 0, false
	}
	return *x, true
}

// fold advances w's state over its due points and adds its new row to out;
// it reports false (and adds nothing) when the series has no point left.
//
// An error that every series of the tracker would meet (its model does not
// make a state) is a *trackerError; any other error, a panic of the
// estimator's included, belongs to this series alone.
func (s *Syncer) fold(w *seriesWork, now time.Time, out *seriesRows) (keep bool, err error) {
	t := w.tracker
	defer func() {
		if r := recover(); r != nil {
			keep, err = false, fmt.Errorf("the estimator failed on this series: %v", r)
		}
	}()
	if w.rebuild || w.state == nil {
		st, err := estimator.NewState(w.spec)
		if err != nil && w.lambda == nil {
			return false, &trackerError{fmt.Errorf("tracker %q: %w", t.Name, err)}
		}
		if err != nil {
			return false, fmt.Errorf("the series' own lambda %v: %w; SELECT sidetrend.tune(%q, per_series => true, apply => true) or rebuild it", *w.lambda, err, t.Name)
		}
		// A replay starts from all points: they were loaded from the first
		// bucket on, because after was MinInt64 for this series.
		w.state, w.hasFold = st, false
	}
	return s.foldPoints(w, now, out)
}

func (s *Syncer) foldPoints(w *seriesWork, now time.Time, out *seriesRows) (bool, error) {
	t := w.tracker
	var lastErr *string
	vals, pendingDue, err := t.dueValues(w.points, now)
	if err != nil {
		return false, &trackerError{err}
	}
	if w.unchangedBy(vals, pendingDue) {
		w.unchanged = true
		return true, nil
	}
	if !w.hasFold && len(vals) > 0 {
		w.first = vals[0].bucket
	}
	lastErr = w.note
	for _, p := range vals {
		y, _ := t.value(p)
		if w.hasFold {
			if gap := p.bucket - w.folded - 1; gap > 0 {
				if err := s.fillGap(w, w.folded+1, gap); err != nil {
					return false, err
				}
			}
		}
		fy, err := t.fitValue(y)
		var step estimator.Step
		if err == nil {
			step, err = w.state.Observe(fy)
		}
		if err == nil {
			w.watch.Observed(p.bucket, fy, step, w.state)
		}
		if err != nil {
			msg := fmt.Sprintf("bucket %d: %v", p.bucket, err)
			lastErr = &msg
			if err := w.state.Skip(1); err != nil {
				return false, err
			}
		}
		w.folded, w.hasFold = p.bucket, true
	}
	if !w.hasFold {
		if pendingDue == nil {
			return false, nil
		}
		// Nothing folded yet, one open bucket: keep the row so the clock
		// sweep finds it.
		out.add(w, nil, pendingDue, lastErr)
		return true, nil
	}
	w.served = out.add(w, w.state, pendingDue, lastErr) != nil
	return true, nil
}

// dueValues returns the points (in bucket order) with a value that are due
// to be folded, and the end of the newest one if the clock has not passed
// it: that one waits (a later bucket with data always closes it).
func (t *Tracker) dueValues(points []point, now time.Time) ([]point, *time.Time, error) {
	vals := make([]point, 0, len(points))
	for _, p := range points {
		if _, ok := t.value(p); ok {
			vals = append(vals, p)
		}
	}
	n := len(vals)
	if n == 0 {
		return vals, nil, nil
	}
	ends, ok := t.bucketEnd(vals[n-1].bucket)
	if !ok && vals[n-1].ends != nil {
		ends, ok = *vals[n-1].ends, true
	}
	if !ok {
		return nil, nil, fmt.Errorf("tracker %q: no end for bucket %d", t.Name, vals[n-1].bucket)
	}
	if now.Before(ends) {
		return vals[:n-1], &ends, nil
	}
	return vals, nil, nil
}

// unchangedBy reports whether folding vals, with the newest bucket waiting
// until pendingDue, leaves w's row as stored: nothing to fold and the same
// bucket waiting (rows that only add to a bucket still open).
func (w *seriesWork) unchangedBy(vals []point, pendingDue *time.Time) bool {
	return len(vals) == 0 && !w.rebuild && pendingDue != nil && w.oldPendingDue != nil && pendingDue.Equal(*w.oldPendingDue)
}

// errNotPositive is what a log tracker says of a bucket value it cannot
// fold: the bucket is skipped like a gap and the series' last_error names it.
var errNotPositive = errors.New("value is not positive (log scale): not folded, skipped like a gap")

// logScale reports whether the tracker fits the logarithms of its values.
func (t *Tracker) logScale() bool { return t.Transform == "log" }

// fitValue maps a bucket value to the scale the state is fitted on: the
// value itself, or its natural logarithm for a log tracker, which has none
// for a value that is not positive (errNotPositive).
func (t *Tracker) fitValue(y float64) (float64, error) {
	if !t.logScale() {
		return y, nil
	}
	if !(y > 0) {
		return 0, fmt.Errorf("%w (the bucket's value is %v)", errNotPositive, y)
	}
	return math.Log(y), nil
}

// fillGap advances over buckets without rows: zeros when the tracker says
// empty buckets mean zero, a skip (no information) otherwise. On the log
// scale an empty bucket is always a gap: 0 has no logarithm.
func (s *Syncer) fillGap(w *seriesWork, from, gap int64) error {
	if w.tracker.Empty == "zero" && !w.tracker.logScale() {
		for i := int64(0); i < gap; i++ {
			step, err := w.state.Observe(0)
			if err != nil {
				return err
			}
			w.watch.Observed(from+i, 0, step, w.state)
		}
		return nil
	}
	for gap > 0 {
		k := min(gap, math.MaxInt32)
		if err := w.state.Skip(int(k)); err != nil {
			return err
		}
		gap -= k
	}
	return nil
}

func nullable(x float64) *float64 {
	if math.IsNaN(x) || math.IsInf(x, 0) {
		return nil
	}
	return &x
}
