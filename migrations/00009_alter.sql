-- Series set aside on their own, trackers changed in place.
--
-- 1. A series whose fold fails (a value or a gap the estimator refuses, a
--    panic) no longer sets its whole tracker aside: its row keeps its last
--    good state and forecasts, last_error and error_at say what failed and
--    when, and failed makes the next change or sidetrend.rebuild replay it
--    from all its points (pgsync/guard.go, failSeriesSQL).

-- +goose Up
ALTER TABLE sidetrend.series
    ADD COLUMN IF NOT EXISTS failed boolean NOT NULL DEFAULT false,
    ADD COLUMN IF NOT EXISTS error_at timestamptz;
COMMENT ON COLUMN sidetrend.series.failed
    IS 'The last fold of this series failed (last_error says why): the row holds its last good state and forecasts, and the next change or sidetrend.rebuild replays it from its points.';
COMMENT ON COLUMN sidetrend.series.error_at IS 'When last_error was written; NULL when the last fold had no error.';
COMMENT ON COLUMN sidetrend.series.last_error
    IS 'The error of the last fold: a bucket the estimator skipped, a state that did not decode (then replayed), or a fold that failed (failed is true).';

-- +goose Down
ALTER TABLE sidetrend.series DROP COLUMN IF EXISTS failed, DROP COLUMN IF EXISTS error_at;
