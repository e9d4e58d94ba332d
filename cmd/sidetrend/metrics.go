package main

import (
	"context"
	"errors"
	"fmt"
	"log/slog"
	"net"
	"net/http"
	"sync"
	"time"

	"github.com/jackc/pgx/v5/pgxpool"
	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/collectors"
	"github.com/prometheus/client_golang/prometheus/promhttp"

	"github.com/sidetrend/sidetrend/pgsync"
)

// healthPolls is how many poll intervals may pass without a finished
// catch-up (or, while a backlog is drained, without a committed batch)
// before /healthz answers 503. A catch-up runs at least once per poll
// interval (jittered by up to +20 %), so three leave room for a slow one.
const healthPolls = 3

// healthSlack is added to the health window so that a very short poll
// interval does not make a busy but healthy sidecar flap.
const healthSlack = 2 * time.Second

// scrapeTimeout bounds the database read a scrape makes.
const scrapeTimeout = 3 * time.Second

// sidecarMetrics counts what the Runner reports through its hooks, reads
// lag and rejects from the database on each scrape, and answers /healthz.
type sidecarMetrics struct {
	reg  *prometheus.Registry
	poll time.Duration
	now  func() time.Time

	changes       prometheus.Counter
	series        prometheus.Counter
	rebuilds      prometheus.Counter
	batches       *prometheus.CounterVec
	batchSeconds  *prometheus.HistogramVec
	sessionErrors prometheus.Counter
	caughtUp      prometheus.Gauge

	mu          sync.Mutex
	started     time.Time
	lastCatchUp time.Time
	lastBatch   time.Time
	lastErr     error
	lastErrAt   time.Time
}

// newSidecarMetrics registers the sidecar's metrics. pool, when not nil, is
// read on every scrape for the lag and the rejects count.
func newSidecarMetrics(poll time.Duration, pool *pgxpool.Pool, log *slog.Logger) *sidecarMetrics {
	reg := prometheus.NewRegistry()
	m := &sidecarMetrics{reg: reg, poll: poll, now: time.Now}
	m.started = m.now()
	f := func(c prometheus.Collector) prometheus.Collector { reg.MustRegister(c); return c }
	m.changes = f(prometheus.NewCounter(prometheus.CounterOpts{
		Name: "sidetrend_changes_drained_total",
		Help: "Change-log rows drained into points and series states.",
	})).(prometheus.Counter)
	m.series = f(prometheus.NewCounter(prometheus.CounterOpts{
		Name: "sidetrend_series_written_total",
		Help: "Series states (with their forecasts and slopes) written.",
	})).(prometheus.Counter)
	m.rebuilds = f(prometheus.NewCounter(prometheus.CounterOpts{
		Name: "sidetrend_rebuilds_total",
		Help: "Series replayed from their points (late rows, updates, deletes, new trackers).",
	})).(prometheus.Counter)
	m.batches = f(prometheus.NewCounterVec(prometheus.CounterOpts{
		Name: "sidetrend_batches_total",
		Help: "Committed batches, by kind: drain (change log) or due (clock or replay request).",
	}, []string{"kind"})).(*prometheus.CounterVec)
	m.batchSeconds = f(prometheus.NewHistogramVec(prometheus.HistogramOpts{
		Name: "sidetrend_batch_duration_seconds",
		Help: "Time from the start of a batch's transaction to its commit.",
		// 1 ms to about 16 s in factors of 2.
		Buckets: prometheus.ExponentialBuckets(0.001, 2, 15),
	}, []string{"kind"})).(*prometheus.HistogramVec)
	m.sessionErrors = f(prometheus.NewCounter(prometheus.CounterOpts{
		Name: "sidetrend_session_errors_total",
		Help: "Sidecar sessions that ended with an error (connection lost, a failed catch-up) and were restarted.",
	})).(prometheus.Counter)
	m.caughtUp = f(prometheus.NewGauge(prometheus.GaugeOpts{
		Name: "sidetrend_last_caught_up_timestamp_seconds",
		Help: "Unix time the last catch-up that left the change log empty finished.",
	})).(prometheus.Gauge)
	for _, kind := range []string{"drain", "due"} {
		m.batches.WithLabelValues(kind)
		m.batchSeconds.WithLabelValues(kind)
	}
	if pool != nil {
		reg.MustRegister(newDBCollector(pool, log))
	}
	reg.MustRegister(collectors.NewGoCollector(), collectors.NewProcessCollector(collectors.ProcessCollectorOpts{}))
	return m
}

// The hooks, for pgsync.RunnerConfig.

func (m *sidecarMetrics) onBatch(b pgsync.BatchInfo) {
	m.changes.Add(float64(b.Changes))
	m.series.Add(float64(b.Series))
	m.rebuilds.Add(float64(b.Rebuilds))
	m.batches.WithLabelValues(b.Kind).Inc()
	m.batchSeconds.WithLabelValues(b.Kind).Observe(b.Took.Seconds())
	m.mu.Lock()
	m.lastBatch = m.now()
	m.mu.Unlock()
}

func (m *sidecarMetrics) onCaughtUp(pgsync.Stats) {
	now := m.now()
	m.caughtUp.Set(float64(now.UnixNano()) / 1e9)
	m.mu.Lock()
	m.lastCatchUp = now
	m.mu.Unlock()
}

func (m *sidecarMetrics) onSessionError(err error) {
	m.sessionErrors.Inc()
	m.mu.Lock()
	m.lastErr, m.lastErrAt = err, m.now()
	m.mu.Unlock()
}

// health says whether the sidecar keeps up: the last catch-up finished
// within healthPolls poll intervals, or a batch of a long catch-up was
// committed within that window. The reason is one line for people.
func (m *sidecarMetrics) health() (ok bool, reason string) {
	m.mu.Lock()
	defer m.mu.Unlock()
	now := m.now()
	window := time.Duration(healthPolls)*m.poll + healthSlack
	ago := func(t time.Time) string { return now.Sub(t).Round(100 * time.Millisecond).String() }
	switch {
	case !m.lastCatchUp.IsZero() && now.Sub(m.lastCatchUp) <= window:
		return true, fmt.Sprintf("ok: caught up %s ago", ago(m.lastCatchUp))
	case !m.lastBatch.IsZero() && now.Sub(m.lastBatch) <= window && m.lastBatch.After(m.lastErrAt):
		return true, fmt.Sprintf("ok: working through a backlog, last batch committed %s ago", ago(m.lastBatch))
	}
	var msg string
	if m.lastCatchUp.IsZero() {
		msg = fmt.Sprintf("no catch-up has finished since the start %s ago", ago(m.started))
	} else {
		msg = fmt.Sprintf("the last catch-up finished %s ago, more than %d poll intervals (%s)", ago(m.lastCatchUp), healthPolls, window)
	}
	if m.lastErr != nil {
		msg += fmt.Sprintf("; last session error %s ago: %v", ago(m.lastErrAt), m.lastErr)
	}
	return false, msg
}

func (m *sidecarMetrics) handler() http.Handler {
	mux := http.NewServeMux()
	mux.Handle("/metrics", promhttp.HandlerFor(m.reg, promhttp.HandlerOpts{Registry: m.reg}))
	mux.HandleFunc("/healthz", func(w http.ResponseWriter, r *http.Request) {
		ok, reason := m.health()
		w.Header().Set("Content-Type", "text/plain; charset=utf-8")
		w.Header().Set("Cache-Control", "no-store")
		if !ok {
			w.WriteHeader(http.StatusServiceUnavailable)
		}
		fmt.Fprintln(w, reason)
	})
	mux.HandleFunc("/", func(w http.ResponseWriter, r *http.Request) {
		if r.URL.Path != "/" {
			http.NotFound(w, r)
			return
		}
		fmt.Fprintln(w, "sidetrend: see /metrics (Prometheus) and /healthz")
	})
	return mux
}

// httpServer serves the metrics handler until stop.
type httpServer struct {
	srv  *http.Server
	addr net.Addr
	done chan struct{}
}

// serveHTTP listens on addr at once (so that a bad or taken address fails
// the start) and serves h in the background.
func serveHTTP(addr string, h http.Handler, log *slog.Logger) (*httpServer, error) {
	l, err := net.Listen("tcp", addr)
	if err != nil {
		return nil, fmt.Errorf("--http %s: %w (give host:port, such as 127.0.0.1:9188)", addr, err)
	}
	s := &httpServer{
		srv:  &http.Server{Handler: h, ReadHeaderTimeout: 10 * time.Second},
		addr: l.Addr(),
		done: make(chan struct{}),
	}
	go func() {
		defer close(s.done)
		if err := s.srv.Serve(l); err != nil && !errors.Is(err, http.ErrServerClosed) {
			log.Error("http server stopped", "addr", s.addr.String(), "err", err)
		}
	}()
	log.Info("serving metrics and health", "addr", s.addr.String(), "metrics", "/metrics", "health", "/healthz")
	return s, nil
}

// stop shuts the server down, waiting briefly for scrapes in flight.
func (s *httpServer) stop() {
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Second)
	defer cancel()
	_ = s.srv.Shutdown(ctx)
	<-s.done
}

// dbCollector reads the lag and the rejects count from the database on each
// scrape.
type dbCollector struct {
	pool *pgxpool.Pool
	log  *slog.Logger

	lag, rejects *prometheus.Desc
	readErrors   prometheus.Counter
}

func newDBCollector(pool *pgxpool.Pool, log *slog.Logger) *dbCollector {
	return &dbCollector{
		pool: pool,
		log:  log,
		lag: prometheus.NewDesc("sidetrend_lag_seconds",
			"Age of the oldest change waiting in sidetrend.changes; 0 when the log is empty.", nil, nil),
		rejects: prometheus.NewDesc("sidetrend_rejects",
			"Rows in sidetrend.rejects: source rows not folded in (NULL, NaN, infinite or out of range).", nil, nil),
		readErrors: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "sidetrend_scrape_errors_total",
			Help: "Scrapes whose read of lag and rejects from the database failed.",
		}),
	}
}

func (d *dbCollector) Describe(ch chan<- *prometheus.Desc) {
	ch <- d.lag
	ch <- d.rejects
	d.readErrors.Describe(ch)
}

func (d *dbCollector) Collect(ch chan<- prometheus.Metric) {
	ctx, cancel := context.WithTimeout(context.Background(), scrapeTimeout)
	defer cancel()
	l, err := pgsync.LoadLag(ctx, d.pool)
	if err != nil {
		d.readErrors.Inc()
		d.log.Warn("metrics: read lag and rejects", "err", err)
	} else {
		ch <- prometheus.MustNewConstMetric(d.lag, prometheus.GaugeValue, l.OldestChange.Seconds())
		ch <- prometheus.MustNewConstMetric(d.rejects, prometheus.GaugeValue, float64(l.Rejects))
	}
	d.readErrors.Collect(ch)
}
