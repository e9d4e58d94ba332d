package pgsync

import (
	"context"
	"errors"
	"fmt"
	"time"

	"github.com/jackc/pgx/v5/pgconn"
)

// DefaultLockTimeout is how long a backfill waits for a lock on a source
// table unless Syncer.LockTimeout says otherwise.
const DefaultLockTimeout = 2 * time.Second

// checkEvery and pruneEvery: how often CatchUp runs sidetrend.check_trackers
// (more often while a tracker waits for its backfill) and prune_rejects.
const (
	checkEvery = 5 * time.Second
	pruneEvery = time.Minute
)

// Rejects kept per tracker, and for how long (sidetrend.prune_rejects).
const (
	RejectsKeepRows = 10000
	RejectsKeepAge  = 30 * 24 * time.Hour
)

// The kinds of batch guarded runs.
type batchKind int

const (
	batchDrain batchKind = iota // claim changes from the log
	batchDue                    // fold closed buckets, replay rebuilds
)

func (s *Syncer) run(ctx context.Context, kind batchKind) (int, error) {
	if kind == batchDrain {
		return s.retry(ctx, s.drainBatch)
	}
	return s.retry(ctx, s.dueBatch)
}

// guarded runs one batch of the given kind. When it fails for a reason that
// belongs to the data (trackerFault) rather than to the connection or the
// server, one tracker's changes or series are at fault, and a whole batch
// would fail again and again, stopping every tracker: isolate then runs a
// batch per tracker, sets aside each tracker whose batch fails, and the
// drain goes on with the others.
func (s *Syncer) guarded(ctx context.Context, kind batchKind) (int, error) {
	n, err := s.run(ctx, kind)
	if err == nil || s.only != 0 || !trackerFault(err) {
		return n, err
	}
	s.log.Warn("batch failed; trying each tracker on its own", "err", err)
	return s.isolate(ctx, kind, err)
}

// isolate runs one batch of kind for each active tracker on its own and sets
// aside those whose batch fails. It returns the work done, or the first
// error again when no tracker could be blamed (then it is not one
// tracker's).
func (s *Syncer) isolate(ctx context.Context, kind batchKind, first error) (int, error) {
	if err := s.refreshTrackers(ctx); err != nil {
		return 0, err
	}
	total, blamed := 0, 0
	for _, id := range sortedIDs(s.trackers) {
		if s.trackers[id].Status != "active" {
			continue
		}
		one := &Syncer{pool: s.pool, log: s.log, now: s.now, trackers: s.trackers, OnBatch: s.OnBatch,
			BatchSize: s.BatchSize, Progress: s.Progress, only: id}
		n, err := one.run(ctx, kind)
		s.stats.add(one.stats)
		switch {
		case err == nil:
			total += n
		case trackerFault(err):
			if err := s.setAside(ctx, id, err); err != nil {
				return total, err
			}
			blamed++
		default:
			return total, err
		}
	}
	if blamed == 0 && total == 0 {
		return 0, first
	}
	// Report work so that the caller's loop goes on with the rest.
	return max(total, 1), nil
}

// setAside marks tracker id broken with err (sidetrend.mark_broken): its
// capture stops, its pending changes go, its forecasts stay as they were,
// and sidetrend.rebuild(name) resumes it with a full backfill.
func (s *Syncer) setAside(ctx context.Context, id int, err error) error {
	name := fmt.Sprint(id)
	if t := s.trackers[id]; t != nil {
		name = t.Name
		t.Status = "broken"
	}
	s.log.Error("tracker set aside: its changes fail; the others go on", "tracker", name, "err", err)
	if _, e := s.pool.Exec(ctx, `SELECT sidetrend.mark_broken($1, $2)`, int32(id), err.Error()); e != nil {
		return fmt.Errorf("set tracker %q aside after %v: %w", name, err, e)
	}
	return nil
}

// trackerFault reports whether err is about the data or rights of one
// tracker (a Postgres error of a class other than connection, transaction
// rollback, resources, operator intervention, system or internal errors,
// or an error of the estimator's while folding) rather than about the
// connection or the server, which every tracker would meet.
func trackerFault(err error) bool {
	if errors.Is(err, context.Canceled) || errors.Is(err, context.DeadlineExceeded) {
		return false
	}
	var pgErr *pgconn.PgError
	if errors.As(err, &pgErr) {
		switch pgErr.SQLState()[:2] {
		case "08", "25", "40", "53", "55", "57", "58", "XX":
			return pgErr.Code == "55P03" // lock_not_available: a busy source table
		}
		return true
	}
	var fe *foldError
	return errors.As(err, &fe)
}

// foldError is an error of the estimator's while folding one series.
type foldError struct {
	id  seriesID
	err error
}

func (e *foldError) Error() string { return fmt.Sprintf("series %q: %v", e.id.key, e.err) }
func (e *foldError) Unwrap() error { return e.err }

// trackerError is an error while folding that every series of one tracker
// would meet (its model makes no state, its calendar has no end for a
// bucket): the tracker is set aside, not the series.
type trackerError struct{ err error }

func (e *trackerError) Error() string { return e.err.Error() }
func (e *trackerError) Unwrap() error { return e.err }

// failSeriesSQL marks series whose fold failed: the row keeps its last good
// state and forecasts, last_error and error_at say what failed and when,
// and failed makes the next change (or sidetrend.rebuild) replay it from
// all its points. It no longer waits for a bucket (pending_due) nor for a
// replay (rebuild), so that the clock does not retry it in every batch.
const failSeriesSQL = `
UPDATE sidetrend.series s SET failed = true, rebuild = false, pending_due = NULL,
    last_error = q.msg, error_at = now(), updated_at = now()
FROM unnest($1::int[], $2::text[], $3::text[]) AS q(tid, key, msg)
WHERE s.tracker_id = q.tid AND s.series_key = q.key`

// checkTrackersSQL pauses trackers whose source no longer passes the checks
// of sidetrend.source_problem (and marks those whose table was dropped
// broken), and resumes paused ones that pass again.
const checkTrackersSQL = `SELECT tracker, status, reason FROM sidetrend.check_trackers($1)`

// checkTrackers runs checkTrackersSQL in full every checkEvery and
// whenever a tracker waits for its backfill (whose capture may have stopped
// because its table changed); otherwise it only looks for dropped tables.
func (s *Syncer) checkTrackers(ctx context.Context) error {
	full := time.Since(s.lastCheck) >= checkEvery
	for _, t := range s.trackers {
		full = full || (!t.Backfilled && t.Status == "active")
	}
	rows, err := s.pool.Query(ctx, checkTrackersSQL, full)
	if err != nil {
		return fmt.Errorf("check trackers: %w", err)
	}
	changed := 0
	for rows.Next() {
		var name, status string
		var reason *string
		if err := rows.Scan(&name, &status, &reason); err != nil {
			rows.Close()
			return fmt.Errorf("check trackers: %w", err)
		}
		changed++
		if reason != nil {
			s.log.Warn("tracker "+status, "tracker", name, "reason", *reason)
		} else {
			s.log.Info("tracker resumed; backfill follows", "tracker", name)
		}
	}
	if err := rows.Err(); err != nil {
		return fmt.Errorf("check trackers: %w", err)
	}
	if full {
		s.lastCheck = time.Now()
	}
	if changed > 0 {
		return s.refreshTrackers(ctx)
	}
	return nil
}

// pruneRejects runs sidetrend.prune_rejects every pruneEvery.
func (s *Syncer) pruneRejects(ctx context.Context) error {
	if time.Since(s.lastPrune) < pruneEvery {
		return nil
	}
	var n int64
	if err := s.pool.QueryRow(ctx, `SELECT sidetrend.prune_rejects($1, $2)`, int32(RejectsKeepRows), RejectsKeepAge).Scan(&n); err != nil {
		return fmt.Errorf("prune rejects: %w", err)
	}
	if n > 0 {
		s.log.Info("rejects pruned", "rows", n)
	}
	s.lastPrune = time.Now()
	return nil
}
