package livetables

import (
	"context"
	"time"

	"github.com/sidetrend/sidetrend/calendar"
	"github.com/sidetrend/sidetrend/estimator"
)

// SeriesInfo describes one tracked series as the endpoint shows it.
type SeriesInfo struct {
	Tracker, Key            string
	Points                  int64 // observed buckets
	FirstBucket, LastBucket time.Time
	Spec                    estimator.Spec    // Lambda is the tracker's stored lambda
	Calendar                calendar.Calendar // bucket width in the tracker's zone
	LastIndex               int64             // bucket index of the newest bucket N
	State                   string            // "warming" or "ready"
}

// Source is the read-only view of the sidecar's stored state that the
// endpoint computes its tables from. Implementations must be safe for
// concurrent use; every call gets the context of the statement that needs
// it, which is cancelled when the client cancels or the endpoint stops.
type Source interface {
	// Series lists series; tracker or key nil means any. Sorted by tracker, key.
	Series(ctx context.Context, tracker, key *string) ([]SeriesInfo, error)
	// State returns the stored estimator state of one series (the sidecar's current fit).
	State(ctx context.Context, tracker, key string) (*estimator.State, error)
	// Values returns the bucket values from the first to the newest bucket, NaN for a
	// bucket that is a gap (already mapped from the tracker's empty-bucket policy).
	Values(ctx context.Context, tracker, key string) ([]float64, error)
}
