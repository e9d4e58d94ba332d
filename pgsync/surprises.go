package pgsync

import (
	"context"
	"encoding/json"
	"fmt"
	"math"

	"github.com/jackc/pgx/v5"

	"github.com/sidetrend/sidetrend/estimator"
)

// SurpriseChannel is the NOTIFY channel surprises are announced on, as JSON
// arrays of events.
const SurpriseChannel = "sidetrend_surprise"

// Kinds of surprise.
const (
	// SurpriseOutside95: the actual fell outside the 95 % interval issued
	// one bucket earlier.
	SurpriseOutside95 = "outside95"
	// SurpriseSlopeTurn: the slope direction turned from up to down or from
	// down to up.
	SurpriseSlopeTurn = "slope_turn"
)

// maxNotifyPayload is the longest NOTIFY payload Postgres accepts: it
// refuses 8000 bytes or more (NOTIFY_PAYLOAD_MAX_LENGTH, BLCKSZ - NAMEDATALEN
// - 128 with the default 8 kB blocks, in async.c).
const maxNotifyPayload = 7999

// Surprise is one event found while a series' buckets were folded. Float
// fields that do not apply are NaN (stored as NULL).
type Surprise struct {
	TrackerID int
	SeriesKey string
	Bucket    int64  // bucket index of the actual
	Kind      string // SurpriseOutside95 or SurpriseSlopeTurn

	Actual   float64 // the bucket's value
	Forecast float64 // one-step forecast issued one bucket earlier
	Lower95  float64 // its 95 % interval
	Upper95  float64
	// Z is (actual - forecast) / se for outside95, and the slope's t statistic
	// slope / slope_se for slope_turn.
	Z float64

	Slope, SlopeT float64 // the slope after the bucket was folded in
	Direction     string  // slope_turn: the new direction, "up" or "down"
}

// Direction classifies a slope as the sidetrend.slopes view does: "up" or
// "down" when |slope / se| >= 2, "flat" otherwise, and "flat" when the
// standard error is undefined or zero (a degree-0 model, too few points).
func Direction(sl estimator.Slope) string {
	if math.IsNaN(sl.SE) || sl.SE == 0 || math.IsNaN(sl.Slope) || math.Abs(sl.Slope/sl.SE) < 2 {
		return "flat"
	}
	if sl.Slope > 0 {
		return "up"
	}
	return "down"
}

// SurpriseWatch collects the surprises of one series while the drain folds
// its buckets. The slope rule: after each bucket with a value, the slope is
// classified by Direction; a "flat" reading changes nothing, and an "up" or
// "down" reading that differs from LastDirection, the last reading that was
// not flat, is a turn. So up, flat, flat, down is one turn (at the down) and
// up, flat, up is none. The first non-flat reading of a series is not a
// turn.
type SurpriseWatch struct {
	TrackerID int
	SeriesKey string
	// LastDirection is series.last_direction: "" (none yet), "up" or
	// "down". Load it with the series; store it back after the fold. A
	// replay from the first bucket starts again from "".
	LastDirection string
	// After is the newest bucket already folded before this batch: buckets
	// at or before it are being replayed and give no event (their surprises
	// were reported when they were first folded), though they still move
	// LastDirection. Use math.MaxInt64 on a series' first fold after a
	// backfill to learn the directions without announcing history.
	After int64
	// Events are the surprises found, in bucket order.
	Events []Surprise
	// Log: the state is fitted on the logarithms of the values (a tracker
	// with transform log). Observed then gets log values and steps, and its
	// events carry the actual, forecast and bounds transformed back (exp);
	// Z stays the standardised error on the log scale.
	Log bool
}

// back maps a number on the fitting scale to the value scale.
func (w *SurpriseWatch) back(x float64) float64 {
	if w.Log {
		return math.Exp(x)
	}
	return x
}

// Observed is called after st.Observe(y) returned step for the given bucket.
func (w *SurpriseWatch) Observed(bucket int64, y float64, step estimator.Step, st *estimator.State) {
	report := bucket > w.After
	if report && step.Scored && !math.IsNaN(step.Lower95) && !step.In95 {
		w.Events = append(w.Events, Surprise{TrackerID: w.TrackerID, SeriesKey: w.SeriesKey, Bucket: bucket,
			Kind: SurpriseOutside95, Actual: w.back(y), Forecast: w.back(step.Forecast), Lower95: w.back(step.Lower95), Upper95: w.back(step.Upper95),
			Z: step.Err / step.SE, Slope: math.NaN(), SlopeT: math.NaN()})
	}
	sl, err := st.Slope()
	if err != nil {
		return // not ready: no direction
	}
	dir, turned := Turn(w.LastDirection, Direction(sl))
	w.LastDirection = dir
	if turned && report {
		ev := Surprise{TrackerID: w.TrackerID, SeriesKey: w.SeriesKey, Bucket: bucket, Kind: SurpriseSlopeTurn,
			Actual: w.back(y), Forecast: math.NaN(), Lower95: math.NaN(), Upper95: math.NaN(), Z: sl.T(),
			Slope: sl.Slope, SlopeT: sl.T(), Direction: dir}
		if step.Scored {
			ev.Forecast, ev.Lower95, ev.Upper95 = w.back(step.Forecast), w.back(step.Lower95), w.back(step.Upper95)
		}
		w.Events = append(w.Events, ev)
	}
}

// Turn applies the slope rule of SurpriseWatch to one reading: it returns
// the new last non-flat direction and whether dir turned from last ("up" to
// "down" or back). A "flat" reading keeps last; the first non-flat reading
// (last "") is not a turn.
func Turn(last, dir string) (next string, turned bool) {
	if dir != "up" && dir != "down" {
		return last, false
	}
	return dir, last != "" && dir != last
}

// insertSurprisesSQL records events once: an event already stored for the
// same series, bucket and kind (a batch retried after a deadlock) is left as
// it is and not announced again.
const insertSurprisesSQL = `
INSERT INTO sidetrend.surprises (tracker_id, tracker, series_key, bucket, period_start, kind,
    actual, forecast, lower95, upper95, z, slope, slope_t, direction)
SELECT q.tid, t.name, q.key, q.bucket, sidetrend.bucket_start(q.bucket, t.bucket, t.tz), q.kind,
       q.actual, q.forecast, q.lower95, q.upper95, q.z, q.slope, q.slope_t, q.direction
FROM unnest($1::int[], $2::text[], $3::bigint[], $4::text[], $5::float8[], $6::float8[], $7::float8[],
            $8::float8[], $9::float8[], $10::float8[], $11::float8[], $12::text[])
     AS q(tid, key, bucket, kind, actual, forecast, lower95, upper95, z, slope, slope_t, direction)
JOIN sidetrend.trackers t ON t.id = q.tid
ORDER BY q.tid, q.key, q.bucket, q.kind
ON CONFLICT (tracker_id, series_key, bucket, kind) DO NOTHING
RETURNING id, tracker_id, kind`

// surpriseEvent is the JSON form of a surprise in a notification: ids
// only. Any role may LISTEN on any channel, so a notification carries no
// value, key or name; a listener reads the rest from sidetrend.surprises by
// id, which shows it only the trackers whose source it may read.
type surpriseEvent struct {
	ID        int64  `json:"id"`
	TrackerID int32  `json:"tracker_id"`
	Kind      string `json:"kind"`
}

// RecordSurprises stores events in sidetrend.surprises in the caller's
// transaction and announces the newly stored ones on SurpriseChannel: JSON
// arrays of {"id", "tracker_id", "kind"}, as many per notification as fit
// in Postgres' payload limit (under 8000 bytes). The notifications are delivered when the
// transaction commits, and not at all when it rolls back.
func RecordSurprises(ctx context.Context, tx pgx.Tx, evs []Surprise) error {
	if len(evs) == 0 {
		return nil
	}
	n := len(evs)
	tids, keys, buckets, kinds := make([]int32, n), make([]string, n), make([]int64, n), make([]string, n)
	actual, forecast, lo, hi := make([]*float64, n), make([]*float64, n), make([]*float64, n), make([]*float64, n)
	z, slope, slopeT, dirs := make([]*float64, n), make([]*float64, n), make([]*float64, n), make([]*string, n)
	for i, e := range evs {
		if e.Kind != SurpriseOutside95 && e.Kind != SurpriseSlopeTurn {
			return fmt.Errorf("record surprises: unknown kind %q: use %q or %q", e.Kind, SurpriseOutside95, SurpriseSlopeTurn)
		}
		tids[i], keys[i], buckets[i], kinds[i] = int32(e.TrackerID), e.SeriesKey, e.Bucket, e.Kind
		actual[i], forecast[i], lo[i], hi[i] = nullable(e.Actual), nullable(e.Forecast), nullable(e.Lower95), nullable(e.Upper95)
		z[i], slope[i], slopeT[i] = nullable(e.Z), nullable(e.Slope), nullable(e.SlopeT)
		if e.Direction != "" {
			d := e.Direction
			dirs[i] = &d
		}
	}
	rows, err := tx.Query(ctx, insertSurprisesSQL, tids, keys, buckets, kinds, actual, forecast, lo, hi, z, slope, slopeT, dirs)
	if err != nil {
		return fmt.Errorf("record surprises: %w", err)
	}
	var payloads [][]byte
	for rows.Next() {
		var e surpriseEvent
		if err := rows.Scan(&e.ID, &e.TrackerID, &e.Kind); err != nil {
			rows.Close()
			return fmt.Errorf("record surprises: %w", err)
		}
		b, err := json.Marshal(e)
		if err != nil {
			rows.Close()
			return fmt.Errorf("record surprises: %w", err)
		}
		payloads = append(payloads, b)
	}
	if err := rows.Err(); err != nil {
		return fmt.Errorf("record surprises: %w", err)
	}
	batch := &pgx.Batch{}
	for _, p := range packPayloads(payloads, maxNotifyPayload) {
		batch.Queue(`SELECT pg_notify($1, $2)`, SurpriseChannel, p)
	}
	if batch.Len() == 0 {
		return nil
	}
	if err := tx.SendBatch(ctx, batch).Close(); err != nil {
		return fmt.Errorf("announce surprises: %w", err)
	}
	return nil
}

// packPayloads joins JSON values into JSON arrays of at most limit bytes
// each, in order; every value must fit in an array of its own.
func packPayloads(items [][]byte, limit int) []string {
	var out []string
	cur := []byte{'['}
	for _, it := range items {
		if len(cur) > 1 && len(cur)+1+len(it)+1 > limit {
			out = append(out, string(append(cur, ']')))
			cur = []byte{'['}
		}
		if len(cur) > 1 {
			cur = append(cur, ',')
		}
		cur = append(cur, it...)
	}
	if len(cur) > 1 {
		out = append(out, string(append(cur, ']')))
	}
	return out
}
