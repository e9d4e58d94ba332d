package sqlwire

import (
	"context"
	"fmt"
	"math"
	"math/rand/v2"
	"sort"
	"sync"
	"testing"
	"time"

	"github.com/sidetrend/sidetrend/calendar"
	"github.com/sidetrend/sidetrend/estimator"
)

// memSource is a Source over series held in memory, each with its values
// and the stored state estimator.Fit gives for them.
type memSource struct {
	series []memSeries

	mu sync.Mutex
	// valuesHook, when set, runs at the start of every Values call; a test
	// uses it to make the source slow and to see the cancellation.
	valuesHook func(ctx context.Context) error
}

type memSeries struct {
	info   SeriesInfo
	values []float64
	state  *estimator.State
}

// seriesSpec describes one generated series of the test scenario.
type seriesSpec struct {
	tracker, key string
	width        calendar.Width
	start        time.Time
	n            int
	spec         estimator.Spec
	gen          func(i int, r *rand.Rand) float64 // NaN marks a gap
}

// newMemSource builds the series, fitting each with its spec.
func newMemSource(t testing.TB, specs []seriesSpec) *memSource {
	t.Helper()
	src := &memSource{}
	for k, s := range specs {
		r := rand.New(rand.NewPCG(1, uint64(k+1))) // seeded per series so that each is reproducible
		ys := make([]float64, s.n)
		points := int64(0)
		for i := range ys {
			ys[i] = s.gen(i, r)
			if !math.IsNaN(ys[i]) {
				points++
			}
		}
		cal, err := calendar.New(s.width, "UTC")
		if err != nil {
			t.Fatalf("calendar for %s/%s: %v", s.tracker, s.key, err)
		}
		st, err := estimator.Fit(s.spec, ys)
		if err != nil {
			t.Fatalf("fit %s/%s: %v", s.tracker, s.key, err)
		}
		first := cal.Index(s.start)
		last := first + int64(s.n) - 1
		state := "warming"
		if st.Ready() {
			state = "ready"
		}
		src.series = append(src.series, memSeries{
			info: SeriesInfo{Tracker: s.tracker, Key: s.key, Points: points,
				FirstBucket: cal.Start(first), LastBucket: cal.Start(last),
				Spec: s.spec, Calendar: cal, LastIndex: last, State: state},
			values: ys, state: st,
		})
	}
	sort.Slice(src.series, func(i, j int) bool {
		a, b := src.series[i].info, src.series[j].info
		if a.Tracker != b.Tracker {
			return a.Tracker < b.Tracker
		}
		return a.Key < b.Key
	})
	return src
}

func (m *memSource) Series(ctx context.Context, tracker, key *string) ([]SeriesInfo, error) {
	var out []SeriesInfo
	for _, s := range m.series {
		if tracker != nil && *tracker != s.info.Tracker || key != nil && *key != s.info.Key {
			continue
		}
		out = append(out, s.info)
	}
	return out, nil
}

func (m *memSource) find(tracker, key string) (*memSeries, error) {
	for i := range m.series {
		if m.series[i].info.Tracker == tracker && m.series[i].info.Key == key {
			return &m.series[i], nil
		}
	}
	return nil, fmt.Errorf("series %s/%s is not tracked", tracker, key)
}

func (m *memSource) State(ctx context.Context, tracker, key string) (*estimator.State, error) {
	s, err := m.find(tracker, key)
	if err != nil {
		return nil, err
	}
	return s.state.Clone(), nil
}

func (m *memSource) Values(ctx context.Context, tracker, key string) ([]float64, error) {
	m.mu.Lock()
	hook := m.valuesHook
	m.mu.Unlock()
	if hook != nil {
		if err := hook(ctx); err != nil {
			return nil, err
		}
	}
	s, err := m.find(tracker, key)
	if err != nil {
		return nil, err
	}
	return append([]float64(nil), s.values...), nil
}

func (m *memSource) setValuesHook(h func(ctx context.Context) error) {
	m.mu.Lock()
	m.valuesHook = h
	m.mu.Unlock()
}

// day is one daily bucket; hour one hourly bucket.
var (
	day  = calendar.Width{Days: 1}
	hour = calendar.Width{Micros: 3600 * 1_000_000}
)

// scenarioSeries is the made-up world the end-to-end tests query: daily
// sales of three shops of a bakery chain (trend plus a weekly cycle), an
// hourly meter of a cold store, and a shop that opened three days ago.
func scenarioSeries() []seriesSpec {
	start := time.Date(2025, 3, 3, 0, 0, 0, 0, time.UTC) // a Monday
	weekly := estimator.Spec{Degree: 1, Period: 7, Harmonics: 2, Lambda: 0.97, BurnIn: 7}
	sales := func(level, growth float64, gapAt int) func(int, *rand.Rand) float64 {
		return func(i int, r *rand.Rand) float64 {
			if i == gapAt {
				return math.NaN() // the shop was closed that day
			}
			return level + growth*float64(i) + 15*math.Sin(2*math.Pi*float64(i)/7) + 4*r.NormFloat64()
		}
	}
	return []seriesSpec{
		{tracker: "bakery_sales", key: "harbour", width: day, start: start, n: 120, spec: weekly, gen: sales(210, 0.8, 40)},
		{tracker: "bakery_sales", key: "market", width: day, start: start, n: 120, spec: weekly, gen: sales(340, -0.3, -1)},
		{tracker: "bakery_sales", key: "station", width: day, start: start, n: 120, spec: weekly, gen: sales(125, 0.2, 77)},
		{tracker: "bakery_sales", key: "uptown", width: day, start: start.AddDate(0, 0, 117), n: 3, spec: weekly, gen: sales(90, 0, -1)},
		{tracker: "cold_store_kwh", key: "hall_a", width: hour, start: start, n: 500,
			spec: estimator.Spec{Degree: 1, Lambda: 0.95, BurnIn: 5},
			gen:  func(i int, r *rand.Rand) float64 { return 40 + 0.01*float64(i) + r.NormFloat64() }},
	}
}

// Models of the benchmarks: a local linear trend (p = 2) and a trend with
// three weekly harmonics (p = 8).
var (
	linearModel = estimator.Spec{Degree: 1, Lambda: 0.98, BurnIn: 7}
	weeklyModel = estimator.Spec{Degree: 1, Period: 7, Harmonics: 3, Lambda: 0.98, BurnIn: 7}
)

// longSeries is one daily series of n points under spec, for the benchmarks.
func longSeries(n int, spec estimator.Spec) []seriesSpec {
	return []seriesSpec{{tracker: "bakery_sales", key: "flagship", width: day,
		start: time.Date(1998, 1, 5, 0, 0, 0, 0, time.UTC), n: n,
		spec: spec,
		gen: func(i int, r *rand.Rand) float64 {
			return 500 + 0.05*float64(i) + 30*math.Cos(2*math.Pi*float64(i)/7) + 10*r.NormFloat64()
		}}}
}
