package sqlwire

import (
	"context"
	"errors"
	"fmt"
	"io"
	"net"
	"strconv"
	"sync"
	"time"
)

// This file holds what bounds the cost one statement or one client may
// put on the endpoint: the settings, their defaults, the per-statement
// budget of rows and memory, and the errors that say which setting to
// change. The query handling calls in at a few places (the IN lists and
// arrays that narrow a parameter column, the table scans, the result it
// holds); everything else lives here.

// Limits bound the work of one statement and the clients of the endpoint.
// A zero field takes the default named in its comment.
type Limits struct {
	// StatementTimeout stops a statement that runs longer; 30 s. A
	// session's own statement_timeout applies when it is shorter.
	StatementTimeout time.Duration
	// MaxInList bounds the values of one IN (...) list or = ANY array;
	// 1,000.
	MaxInList int
	// MaxRows bounds the rows one statement (or one cursor's query)
	// computes: the rows the tables produce before Postgres evaluates the
	// query over them; 1,000,000.
	MaxRows int64
	// MaxStatementMemory bounds, in bytes, what one statement holds at
	// once: the computed rows on their way to Postgres and the result on
	// its way to the client; 256 MiB.
	MaxStatementMemory int64
	// MaxMessageSize bounds one frontend message, so the text of a query
	// and its parameters, in bytes; 1 MiB. Longer ones are refused before
	// they are read.
	MaxMessageSize int
	// MaxUnauthenticated bounds the connections that have not logged in
	// yet; 64. Beyond it new connections are closed at once.
	MaxUnauthenticated int
	// AuthFailureDelay is the delay after the first failed login from an
	// address; 250 ms. Each further failure doubles it up to
	// AuthFailureMaxDelay (5 s); a minute without failures from the address
	// forgets them.
	AuthFailureDelay, AuthFailureMaxDelay time.Duration
}

// Defaults of Limits.
const (
	DefaultStatementTimeout    = 30 * time.Second
	DefaultMaxInList           = 1000
	DefaultMaxRows             = 1_000_000
	DefaultMaxStatementMemory  = 256 << 20
	DefaultMaxMessageSize      = 1 << 20
	DefaultMaxUnauthenticated  = 64
	DefaultAuthFailureDelay    = 250 * time.Millisecond
	DefaultAuthFailureMaxDelay = 5 * time.Second
)

// authQuietPeriod is how long an address must go without a failed login
// for its failures to be forgotten.
const authQuietPeriod = time.Minute

// maxAuthAddresses bounds the table of addresses with recent failed
// logins; when it is full the quietest address is forgotten.
const maxAuthAddresses = 10_000

// clientCheckInterval is how often a running statement checks that its
// client is still connected.
const clientCheckInterval = 200 * time.Millisecond

// withDefaults fills the zero fields.
func (l Limits) withDefaults() Limits {
	if l.StatementTimeout == 0 {
		l.StatementTimeout = DefaultStatementTimeout
	}
	if l.MaxInList == 0 {
		l.MaxInList = DefaultMaxInList
	}
	if l.MaxRows == 0 {
		l.MaxRows = DefaultMaxRows
	}
	if l.MaxStatementMemory == 0 {
		l.MaxStatementMemory = DefaultMaxStatementMemory
	}
	if l.MaxMessageSize == 0 {
		l.MaxMessageSize = DefaultMaxMessageSize
	}
	if l.MaxUnauthenticated == 0 {
		l.MaxUnauthenticated = DefaultMaxUnauthenticated
	}
	if l.AuthFailureDelay == 0 {
		l.AuthFailureDelay = DefaultAuthFailureDelay
	}
	if l.AuthFailureMaxDelay == 0 {
		l.AuthFailureMaxDelay = DefaultAuthFailureMaxDelay
	}
	return l
}

// check reports a limit that cannot work.
func (l Limits) check() error {
	switch {
	case l.StatementTimeout < 0:
		return fmt.Errorf("sqlwire: statement timeout %v is negative: use a positive duration such as 30s", l.StatementTimeout)
	case l.MaxInList < 1, l.MaxRows < 1, l.MaxStatementMemory < 1, l.MaxUnauthenticated < 1:
		return fmt.Errorf("sqlwire: limits must be positive (IN list %d, rows %d, statement memory %d, unauthenticated connections %d)",
			l.MaxInList, l.MaxRows, l.MaxStatementMemory, l.MaxUnauthenticated)
	case l.MaxMessageSize < 4096:
		return fmt.Errorf("sqlwire: maximum message size %d bytes is too small for postgres_fdw's statements: use at least 4096", l.MaxMessageSize)
	case l.AuthFailureDelay < 0 || l.AuthFailureMaxDelay < l.AuthFailureDelay:
		return fmt.Errorf("sqlwire: login failure delay %v up to %v: use 0 <= delay <= maximum delay", l.AuthFailureDelay, l.AuthFailureMaxDelay)
	}
	return nil
}

// Setting names as the sidecar's flags spell them, for the errors.
const (
	flagStatementTimeout = "--sql-statement-timeout (SIDETREND_SQL_STATEMENT_TIMEOUT)"
	flagMaxInList        = "--sql-max-in-list (SIDETREND_SQL_MAX_IN_LIST)"
	flagMaxRows          = "--sql-max-rows (SIDETREND_SQL_MAX_ROWS)"
	flagMaxMemory        = "--sql-max-statement-memory-mb (SIDETREND_SQL_MAX_STATEMENT_MEMORY_MB)"
	flagMaxMessage       = "--sql-max-message-kb (SIDETREND_SQL_MAX_MESSAGE_KB)"
)

// SQLSTATEs of the limits.
const (
	codeProgramLimit = "54000" // program_limit_exceeded
	codeOutOfMemory  = "53200" // out_of_memory
)

// errClientGone is the cause of a statement whose client disconnected.
var errClientGone = errors.New("the client disconnected")

// statementTimeoutError is the error, and the context cause, of a
// statement that ran past StatementTimeout.
func (l *Limits) statementTimeoutError() *sqlError {
	return errorf(codeQueryCanceled, "canceling statement due to statement timeout: the sidetrend endpoint stops statements after %v", l.StatementTimeout).
		withHint("narrow the query (fewer series, lambdas or horizons), or raise %s", flagStatementTimeout)
}

func (l *Limits) inListError(n int) *sqlError {
	return errorf(codeProgramLimit, "an IN list or ANY array of %d values is more than the %d the sidetrend endpoint allows", n, l.MaxInList).
		withHint("split the query into several, or raise %s", flagMaxInList)
}

func (l *Limits) messageSizeError(n int) *sqlError {
	return fatalf(codeProgramLimit, "a message of %d bytes is larger than the %d bytes the sidetrend endpoint accepts", n, l.MaxMessageSize).
		withHint("send shorter statements (fewer IN values), or raise %s", flagMaxMessage)
}

func formatCount(n int64) string {
	s := strconv.FormatInt(n, 10)
	out := make([]byte, 0, len(s)+len(s)/3)
	for i := range len(s) {
		if i > 0 && (len(s)-i)%3 == 0 && s[i-1] != '-' {
			out = append(out, ',')
		}
		out = append(out, s[i])
	}
	return string(out)
}

// plural is "1 lambda", "3 lambdas".
func plural(n int, word string) string {
	if n == 1 {
		return "1 " + word
	}
	return strconv.Itoa(n) + " " + word + "s"
}

// budget is what one statement (or one cursor's query) may still compute
// and hold. It is used by one goroutine.
type budget struct {
	lim  *Limits
	rows int64 // rows computed so far
	held int64 // bytes held so far
}

func newBudget(lim *Limits) *budget { return &budget{lim: lim} }

// Expect checks, before a scan computes anything, that its rows (an upper
// bound, described by what), each holding about rowBytes until Postgres
// has them, fit the row and memory limits, and counts them
// (livetables.Budget).
func (b *budget) Expect(rows, rowBytes int64, what string) error {
	if b == nil {
		return nil
	}
	if rows > b.lim.MaxRows-b.rows {
		return errorf(codeProgramLimit, "this query would compute %s rows (%s); the sidetrend endpoint computes at most %s rows per statement",
			formatCount(rows), what, formatCount(b.lim.MaxRows)).
			withHint("narrow it with conditions on tracker, series_key, lambda or horizon, or raise %s", flagMaxRows)
	}
	if rows > (b.lim.MaxStatementMemory-b.held)/rowBytes {
		return b.memoryError(rows*rowBytes, "the computed rows ("+what+")")
	}
	b.rows += rows
	b.held += rows * rowBytes
	return nil
}

// holdBytes counts n held bytes.
func (b *budget) holdBytes(n int64, what string) error {
	if b == nil {
		return nil
	}
	b.held += n
	if b.held > b.lim.MaxStatementMemory {
		return b.memoryError(b.held, what)
	}
	return nil
}

func (b *budget) memoryError(bytes int64, what string) *sqlError {
	return errorf(codeOutOfMemory, "%s would hold about %d MiB; the sidetrend endpoint holds at most %d MiB per statement",
		what, (bytes+(1<<20)-1)>>20, b.lim.MaxStatementMemory>>20).
		withHint("narrow the query with conditions on tracker, series_key, lambda or horizon, or raise %s", flagMaxMemory)
}

// checkInList refuses an array of more values than MaxInList.
func (l *Limits) checkInList(n int) error {
	if l != nil && n > l.MaxInList {
		return l.inListError(n)
	}
	return nil
}

// admitUnauthenticated counts a new connection as not logged in yet, or
// closes it at once when MaxUnauthenticated others are still logging in.
// The refusal is logged at most once a second, with how many there were.
func (s *Server) admitUnauthenticated(conn net.Conn) bool {
	if s.unauth.Add(1) <= int64(s.cfg.Limits.MaxUnauthenticated) {
		return true
	}
	s.unauth.Add(-1)
	refused := s.unauthRefused.Add(1)
	// Best effort: the client may not read it. A fresh socket's send
	// buffer is empty, so the write does not wait.
	conn.SetWriteDeadline(time.Now().Add(100 * time.Millisecond))
	var buf []byte
	buf, _ = errorResponse(fatalf(codeTooManyConnections, "sorry, too many clients are logging in: the endpoint allows %d connections that have not authenticated yet",
		s.cfg.Limits.MaxUnauthenticated)).Encode(buf)
	conn.Write(buf)
	conn.Close()
	now := time.Now().UnixNano()
	if last := s.lastRefusalLog.Load(); now-last >= int64(time.Second) && s.lastRefusalLog.CompareAndSwap(last, now) {
		s.log.Warn("sql endpoint refused a connection: too many connections not logged in",
			"remote", conn.RemoteAddr().String(), "max_unauthenticated", s.cfg.Limits.MaxUnauthenticated, "refused_total", refused)
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

// watchClient checks every clientCheckInterval, while a statement runs,
// that its client is still connected, and cancels the statement with
// errClientGone when it is not. stop ends the checks.
func (sess *session) watchClient(cancel context.CancelCauseFunc) (stop func()) {
	var (
		mu      sync.Mutex
		stopped bool
		t       *time.Timer
	)
	check := func() {
		gone := peerClosed(sess.conn)
		mu.Lock()
		defer mu.Unlock()
		if stopped {
			return
		}
		if gone {
			sess.log.Info("sql endpoint client disconnected during a statement: cancelling it")
			cancel(errClientGone)
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
func (sess *session) refuseMessage(n int) {
	lim := &sess.srv.cfg.Limits
	sess.log.Warn("sql endpoint refused a message over the size limit", "bytes", n, "max_bytes", lim.MaxMessageSize)
	sess.goodbye(lim.messageSizeError(n))
	sess.conn.SetReadDeadline(time.Now().Add(2 * time.Second))
	io.CopyN(io.Discard, sess.conn, int64(min(n, maxDrain)))
}
