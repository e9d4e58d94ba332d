package main

import (
	"io"
	"log/slog"
	"os"
	"sync"
	"time"

	"github.com/schollz/progressbar/v3"
	"golang.org/x/term"

	"github.com/sidetrend/sidetrend/pgsync"
)

// progressDelay is how long work runs before a bar or a log line about it
// appears: backfills and replays of a few series end sooner, and a bar for
// each would only flicker.
const progressDelay = time.Second

// progressLogEvery is the interval of the log lines when stderr is not a
// terminal.
const progressLogEvery = 2 * time.Second

// newProgress returns a bar on stderr when it is a terminal and periodic log
// lines otherwise.
func newProgress(log *slog.Logger) pgsync.Progress {
	if term.IsTerminal(int(os.Stderr.Fd())) {
		return &barProgress{w: os.Stderr, delay: progressDelay}
	}
	return newLogProgress(log, progressLogEvery)
}

// barProgress draws a progress bar with rate and time left. The bar appears
// once the work has run for delay.
type barProgress struct {
	w     io.Writer
	delay time.Duration // how long work runs before the bar appears
	mu    sync.Mutex
	bar   *progressbar.ProgressBar
	label string
	total int64
	done  int64
	began time.Time
}

func (p *barProgress) Start(label string, total int64) {
	p.mu.Lock()
	defer p.mu.Unlock()
	p.finishLocked()
	p.label, p.total, p.done, p.began = label, total, 0, time.Now()
}

func (p *barProgress) Add(n int64) {
	p.mu.Lock()
	defer p.mu.Unlock()
	p.done += n
	if p.bar == nil {
		if p.began.IsZero() || time.Since(p.began) < p.delay {
			return
		}
		p.bar = progressbar.NewOptions64(p.total,
			progressbar.OptionSetWriter(p.w),
			progressbar.OptionSetDescription(p.label),
			progressbar.OptionShowCount(),
			progressbar.OptionShowIts(),
			progressbar.OptionSetItsString("items"),
			progressbar.OptionSetPredictTime(true),
			progressbar.OptionSetElapsedTime(true),
			progressbar.OptionThrottle(100*time.Millisecond),
			progressbar.OptionShowElapsedTimeOnFinish(),
			progressbar.OptionOnCompletion(func() { io.WriteString(p.w, "\n") }),
		)
		_ = p.bar.Set64(p.done)
		return
	}
	_ = p.bar.Add64(n)
}

func (p *barProgress) Done() {
	p.mu.Lock()
	defer p.mu.Unlock()
	p.finishLocked()
}

func (p *barProgress) finishLocked() {
	if p.bar != nil {
		_ = p.bar.Finish()
		p.bar = nil
	}
	p.began = time.Time{}
}

// logProgress writes a structured log line every interval while work runs
// (the first one interval after it starts) and one when it ends, if it ran
// long enough for any.
type logProgress struct {
	log   *slog.Logger
	every time.Duration

	mu     sync.Mutex
	label  string
	total  int64
	done   int64
	began  time.Time
	logged bool
	stop   chan struct{}
	wg     sync.WaitGroup
}

func newLogProgress(log *slog.Logger, every time.Duration) *logProgress {
	return &logProgress{log: log, every: every}
}

func (p *logProgress) Start(label string, total int64) {
	p.Done()
	p.mu.Lock()
	p.label, p.total, p.done, p.began, p.logged = label, total, 0, time.Now(), false
	p.stop = make(chan struct{})
	stop := p.stop
	p.mu.Unlock()
	p.wg.Add(1)
	go func() {
		defer p.wg.Done()
		tick := time.NewTicker(p.every)
		defer tick.Stop()
		for {
			select {
			case <-stop:
				return
			case <-tick.C:
				p.line("progress")
			}
		}
	}()
}

func (p *logProgress) Add(n int64) {
	p.mu.Lock()
	p.done += n
	p.mu.Unlock()
}

func (p *logProgress) Done() {
	p.mu.Lock()
	stop := p.stop
	p.stop = nil
	p.mu.Unlock()
	if stop == nil {
		return
	}
	close(stop)
	p.wg.Wait()
	p.mu.Lock()
	logged := p.logged
	p.mu.Unlock()
	if logged {
		p.line("done")
	}
}

// line logs where the work is: done of total, the rate and, when the total
// is known, the time left at that rate.
func (p *logProgress) line(msg string) {
	p.mu.Lock()
	label, total, done, elapsed := p.label, p.total, p.done, time.Since(p.began)
	p.logged = true
	p.mu.Unlock()
	rate := float64(done) / elapsed.Seconds()
	attrs := []any{"work", label, "done", done, "elapsed_s", round1(elapsed.Seconds()), "per_s", round1(rate)}
	if total >= 0 {
		attrs = append(attrs, "total", total)
		if msg != "done" && rate > 0 {
			attrs = append(attrs, "left_s", round1(float64(total-done)/rate))
		}
	}
	p.log.Info(msg, attrs...)
}

func round1(x float64) float64 { return float64(int64(x*10+0.5)) / 10 }
