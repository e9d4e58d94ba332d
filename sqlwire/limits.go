package sqlwire

import (
	"fmt"
	"github.com/sidetrend/sidetrend/sqlwire/wire"
	"strconv"
	"time"
)

// This file holds what bounds the cost one statement or one client may
// put on the endpoint: the settings, their defaults, the per-statement
// budget of rows and memory, and the errors that say which setting to
// change. The query handling calls in at a few places (the IN lists and
// arrays that narrow a parameter column, the table scans, the result it
// holds). The limits on clients (connections not logged in, failed
// logins, message size) are enforced by package wire, which New configures
// from the same Limits.

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
	DefaultMaxMessageSize      = wire.DefaultMaxMessageSize
	DefaultMaxUnauthenticated  = wire.DefaultMaxUnauthenticated
	DefaultAuthFailureDelay    = wire.DefaultAuthFailureDelay
	DefaultAuthFailureMaxDelay = wire.DefaultAuthFailureMaxDelay
)

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
)

// SQLSTATEs of the limits.
const (
	codeProgramLimit = "54000" // program_limit_exceeded
	codeOutOfMemory  = "53200" // out_of_memory
)

// statementTimeoutError is the error, and the context cause, of a
// statement that ran past StatementTimeout.
func (l *Limits) statementTimeoutError() *sqlError {
	return errorf(codeQueryCanceled, "canceling statement due to statement timeout: the sidetrend endpoint stops statements after %v", l.StatementTimeout).
		WithHint("narrow the query (fewer series, lambdas or horizons), or raise %s", flagStatementTimeout)
}

func (l *Limits) inListError(n int) *sqlError {
	return errorf(codeProgramLimit, "an IN list or ANY array of %d values is more than the %d the sidetrend endpoint allows", n, l.MaxInList).
		WithHint("split the query into several, or raise %s", flagMaxInList)
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
			WithHint("narrow it with conditions on tracker, series_key, lambda or horizon, or raise %s", flagMaxRows)
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
		WithHint("narrow the query with conditions on tracker, series_key, lambda or horizon, or raise %s", flagMaxMemory)
}

// checkInList refuses an array of more values than MaxInList.
func (l *Limits) checkInList(n int) error {
	if l != nil && n > l.MaxInList {
		return l.inListError(n)
	}
	return nil
}
