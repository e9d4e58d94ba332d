package main

import (
	"bytes"
	"encoding/json"
	"log/slog"
	"strings"
	"sync"
	"testing"
)

// syncBuffer is a bytes.Buffer safe for the logger goroutine and the test.
type syncBuffer struct {
	mu sync.Mutex
	b  bytes.Buffer
}

func (s *syncBuffer) Write(p []byte) (int, error) {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.b.Write(p)
}

func (s *syncBuffer) String() string {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.b.String()
}

func TestLogProgress(t *testing.T) {
	var buf syncBuffer
	// Every millisecond, so that a line comes soon.
	p := newLogProgress(slog.New(slog.NewJSONHandler(&buf, nil)), 1e6)
	p.Start("replaying series", 10)
	p.Add(4)
	waitUntil(t, "a progress line after the first Add", func() bool { return strings.Contains(buf.String(), `"done":4`) })
	p.Add(6)
	p.Done()
	p.Done() // a second Done is harmless
	lines := strings.Split(strings.TrimSpace(buf.String()), "\n")
	var last map[string]any
	if err := json.Unmarshal([]byte(lines[len(lines)-1]), &last); err != nil {
		t.Fatal(err)
	}
	if last["msg"] != "done" || last["work"] != "replaying series" || last["done"] != 10.0 || last["total"] != 10.0 {
		t.Errorf("last line %v, want done with 10 of 10 replaying series", last)
	}
	// A line logged after the first Add has the time left at that rate.
	var withLeft bool
	for _, l := range lines {
		var m map[string]any
		if err := json.Unmarshal([]byte(l), &m); err != nil {
			t.Fatal(err)
		}
		if _, ok := m["left_s"]; ok && m["msg"] == "progress" {
			withLeft = true
		}
	}
	if !withLeft {
		t.Errorf("no progress line has the time left:\n%s", buf.String())
	}

	// Work that ends before the first interval logs nothing.
	var quiet syncBuffer
	q := newLogProgress(slog.New(slog.NewJSONHandler(&quiet, nil)), 1e12)
	q.Start("backfilling trackers", 1)
	q.Add(1)
	q.Done()
	if quiet.String() != "" {
		t.Errorf("short work logged %q", quiet.String())
	}
}

func TestBarProgress(t *testing.T) {
	var buf bytes.Buffer
	p := &barProgress{w: &buf} // no delay: the bar appears at the first Add
	p.Start("replaying series", 4)
	for range 4 {
		p.Add(1)
	}
	p.Done()
	out := buf.String()
	if !strings.Contains(out, "replaying series") || !strings.Contains(out, "4/4") {
		t.Errorf("bar output %q lacks the label and 4/4", out)
	}

	var none bytes.Buffer
	q := &barProgress{w: &none, delay: progressDelay}
	q.Start("backfilling trackers", 1)
	q.Add(1)
	q.Done()
	if none.Len() != 0 {
		t.Errorf("work shorter than the delay drew %q", none.String())
	}
}
