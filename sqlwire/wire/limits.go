package wire

import (
	"context"
	"io"
	"net"
	"sync"
	"time"
)

// This file holds what bounds the cost of clients on the protocol side:
// connections that have not logged in, failed logins, the size of one
// message, and the check that a running statement's client is still there.

// authQuietPeriod is how long an address must go without a failed login
// for its failures to be forgotten.
const authQuietPeriod = time.Minute

// maxAuthAddresses bounds the table of addresses with recent failed
// logins; when it is full the quietest address is forgotten.
const maxAuthAddresses = 10_000

// clientCheckInterval is how often a running statement checks that its
// client is still connected.
const clientCheckInterval = 200 * time.Millisecond

// flagMaxMessage is the sidecar's flag for MaxMessageSize, for the error.
const flagMaxMessage = "--sql-max-message-kb (SIDETREND_SQL_MAX_MESSAGE_KB)"

func (s *Server) messageSizeError(n int) *Error {
	return Fatalf(codeProgramLimit, "a message of %d bytes is larger than the %d bytes the sidetrend endpoint accepts", n, s.cfg.MaxMessageSize).
		WithHint("send shorter statements (fewer IN values), or raise %s", flagMaxMessage)
}

// admitUnauthenticated counts a new connection as not logged in yet, or
// closes it at once when MaxUnauthenticated others are still logging in.
// The refusal is logged at most once a second, with how many there were.
func (s *Server) admitUnauthenticated(conn net.Conn) bool {
	if s.unauth.Add(1) <= int64(s.cfg.MaxUnauthenticated) {
		return true
	}
	s.unauth.Add(-1)
	refused := s.unauthRefused.Add(1)
	// Best effort: the client may not read it. A fresh socket's send
	// buffer is empty, so the write does not wait.
	conn.SetWriteDeadline(time.Now().Add(100 * time.Millisecond))
	var buf []byte
	buf, _ = errorResponse(Fatalf(codeTooManyConnections, "sorry, too many clients are logging in: the endpoint allows %d connections that have not authenticated yet",
		s.cfg.MaxUnauthenticated)).Encode(buf)
	conn.Write(buf)
	conn.Close()
	now := time.Now().UnixNano()
	if last := s.lastRefusalLog.Load(); now-last >= int64(time.Second) && s.lastRefusalLog.CompareAndSwap(last, now) {
		s.log.Warn("sql endpoint refused a connection: too many connections not logged in",
			"remote", conn.RemoteAddr().String(), "max_unauthenticated", s.cfg.MaxUnauthenticated, "refused_total", refused)
	}
	return false
}

// authThrottle delays the answer to a failed login, per client address:
// the first failure waits base, each further one twice as long up to max;
// an address without failures for authQuietPeriod starts again. The table
// holds at most size addresses; when it is full, the quietest goes.
type authThrottle struct {
	base, max time.Duration
	size      int
	now       func() time.Time

	mu    sync.Mutex
	addrs map[string]*authFailures
}

type authFailures struct {
	n    int
	last time.Time
}

func newAuthThrottle(base, max time.Duration, size int) *authThrottle {
	return &authThrottle{base: base, max: max, size: size, now: time.Now, addrs: map[string]*authFailures{}}
}

// failed records a failed login from addr and returns how long to wait
// before answering it.
func (a *authThrottle) failed(addr string) time.Duration {
	a.mu.Lock()
	defer a.mu.Unlock()
	now := a.now()
	f := a.addrs[addr]
	if f != nil && now.Sub(f.last) >= authQuietPeriod {
		f.n = 0
	}
	if f == nil {
		if len(a.addrs) >= a.size {
			a.evict(now)
		}
		f = &authFailures{}
		a.addrs[addr] = f
	}
	f.n++
	f.last = now
	d := a.base
	for i := 1; i < f.n && d < a.max; i++ {
		d *= 2
	}
	return min(d, a.max)
}

// evict drops every quiet address, or the quietest when none is.
func (a *authThrottle) evict(now time.Time) {
	var oldest string
	var oldestAt time.Time
	for k, f := range a.addrs {
		if now.Sub(f.last) >= authQuietPeriod {
			delete(a.addrs, k)
			continue
		}
		if oldest == "" || f.last.Before(oldestAt) {
			oldest, oldestAt = k, f.last
		}
	}
	if len(a.addrs) >= a.size {
		delete(a.addrs, oldest)
	}
}

// len is the number of addresses remembered.
func (a *authThrottle) len() int {
	a.mu.Lock()
	defer a.mu.Unlock()
	return len(a.addrs)
}

// hostOf is the address part of a remote address, the key of the login
// throttle: a client's ports all count as one.
func hostOf(addr net.Addr) string {
	if tcp, ok := addr.(*net.TCPAddr); ok {
		return tcp.IP.String()
	}
	host, _, err := net.SplitHostPort(addr.String())
	if err != nil {
		return addr.String()
	}
	return host
}

// WatchClient checks every clientCheckInterval, while a statement runs,
// that its client is still connected, and cancels the statement with
// ErrClientGone when it is not. stop ends the checks.
func (c *Conn) WatchClient(cancel context.CancelCauseFunc) (stop func()) {
	var (
		mu      sync.Mutex
		stopped bool
		t       *time.Timer
	)
	check := func() {
		gone := peerClosed(c.conn)
		mu.Lock()
		defer mu.Unlock()
		if stopped {
			return
		}
		if gone {
			c.log.Info("sql endpoint client disconnected during a statement: cancelling it")
			cancel(ErrClientGone)
			return
		}
		t.Reset(clientCheckInterval)
	}
	mu.Lock()
	t = time.AfterFunc(clientCheckInterval, check)
	mu.Unlock()
	return func() {
		mu.Lock()
		stopped = true
		t.Stop()
		mu.Unlock()
	}
}

// maxDrain bounds what is read and dropped of a refused message.
const maxDrain = 64 << 20

// refuseMessage ends the session after a message longer than
// MaxMessageSize, without reading it into memory: it sends FATAL 54000,
// then reads and drops the rest of the message for up to two seconds, so
// that a client still sending it reads the error rather than a reset
// connection.
func (c *Conn) refuseMessage(n int) {
	c.log.Warn("sql endpoint refused a message over the size limit", "bytes", n, "max_bytes", c.srv.cfg.MaxMessageSize)
	c.goodbye(c.srv.messageSizeError(n))
	c.conn.SetReadDeadline(time.Now().Add(2 * time.Second))
	io.CopyN(io.Discard, c.conn, int64(min(n, maxDrain)))
}
