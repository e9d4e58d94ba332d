package wire

import (
	"fmt"
	"testing"
	"time"
)

func TestAuthThrottleTable(t *testing.T) {
	t.Parallel()
	now := time.Date(2026, 1, 1, 0, 0, 0, 0, time.UTC)
	a := newAuthThrottle(250*time.Millisecond, 5*time.Second, 3)
	a.now = func() time.Time { return now }
	var got []time.Duration
	for range 7 {
		got = append(got, a.failed("192.0.2.1"))
		now = now.Add(time.Second)
	}
	// 250 ms doubling: 0.25, 0.5, 1, 2, 4, then the 5 s cap.
	want := []time.Duration{250, 500, 1000, 2000, 4000, 5000, 5000}
	for i := range want {
		if got[i] != want[i]*time.Millisecond {
			t.Fatalf("delays %v, want %v ms", got, want)
		}
	}
	// A quiet minute forgets the failures.
	now = now.Add(authQuietPeriod)
	if d := a.failed("192.0.2.1"); d != 250*time.Millisecond {
		t.Errorf("after a quiet minute: %v, want 250ms", d)
	}
	// The table keeps at most 3 addresses; the quietest goes first.
	for i := 2; i <= 5; i++ {
		now = now.Add(time.Second)
		a.failed(fmt.Sprintf("192.0.2.%d", i))
	}
	if a.len() != 3 {
		t.Fatalf("%d addresses remembered, want 3", a.len())
	}
	if _, ok := a.addrs["192.0.2.1"]; ok {
		t.Error("the quietest address was kept")
	}
}
