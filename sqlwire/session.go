package sqlwire

import (
	"context"
	"errors"
	"fmt"
	"strings"
	"sync"
	"time"

	"github.com/jackc/pgx/v5/pgproto3"
	"github.com/sidetrend/sidetrend/sqlwire/wire"
)

// flushEvery is how many data rows are buffered before they are written.
const flushEvery = 256

type txStatus byte

const (
	txIdle   txStatus = 'I'
	txBlock  txStatus = 'T'
	txFailed txStatus = 'E'
)

// session is the query side of one client session (wire.Session).
type session struct {
	srv *Server
	w   *wire.Conn

	set *settings

	tx         txStatus
	txSnapshot *settings // settings at BEGIN, restored by ROLLBACK
	savepoints []savepoint
	cursors    map[string]*cursor
	cursorSeq  int
	prepared   map[string]*prepared
	portals    map[string]*portal

	// The running statement's cancel function, for CancelRequest.
	mu         sync.Mutex
	cancelStmt context.CancelCauseFunc
}

type savepoint struct {
	name      string
	settings  *settings
	cursorSeq int
}

// cursor is a DECLAREd cursor: its query's result, evaluated at DECLARE,
// and how far FETCH has read it.
type cursor struct {
	name string
	res  *result
	pos  int
	seq  int
}

// prepared is a parsed statement of the extended protocol.
type prepared struct {
	sql       string
	st        stmt
	paramOIDs []uint32 // declared by Parse (0: inferred by Postgres), extended to the highest $n used
}

// portal is a bound statement.
type portal struct {
	prep   *prepared
	params []paramVal
	res    *result // SELECT: evaluated at the first Describe or Execute
	pos    int
	sent   int64
	done   bool
}

// wireError gives an error its SQLSTATE for the protocol side; nil stays
// nil.
func wireError(err error) error {
	if err == nil {
		return nil
	}
	return asSQLError(err)
}

// SetParameter sets a startup parameter or option.
func (sess *session) SetParameter(name, value string) error {
	return wireError(sess.set.set(name, value, false))
}

// Reported is the reported settings' values, in settingList's order.
func (sess *session) Reported() []wire.Parameter {
	var out []wire.Parameter
	for _, st := range settingList {
		if st.reported {
			out = append(out, wire.Parameter{Name: st.name, Value: sess.set.get(strings.ToLower(st.name))})
		}
	}
	return out
}

// TxStatus is the transaction status for ReadyForQuery.
func (sess *session) TxStatus() byte { return byte(sess.tx) }

func (sess *session) Parse(m *pgproto3.Parse) error       { return wireError(sess.parse(m)) }
func (sess *session) Bind(m *pgproto3.Bind) error         { return wireError(sess.bind(m)) }
func (sess *session) Describe(m *pgproto3.Describe) error { return wireError(sess.describe(m)) }
func (sess *session) Execute(m *pgproto3.Execute) error   { return wireError(sess.execute(m)) }
func (sess *session) Close(m *pgproto3.Close) error       { return wireError(sess.closeObject(m)) }

// Sync ends the implicit transaction of a Sync outside a block.
func (sess *session) Sync() { sess.endImplicit() }

// Failed marks a transaction block failed after an error.
func (sess *session) Failed() {
	if sess.tx == txBlock {
		sess.tx = txFailed
	}
}

// End closes the session's cursors and portals.
func (sess *session) End() {
	sess.cursors = nil
	sess.portals = nil
}

func (sess *session) notice(code, format string, args ...any) {
	sess.w.Send(&pgproto3.NoticeResponse{Severity: "WARNING", SeverityUnlocalized: "WARNING", Code: code,
		Message: fmt.Sprintf(format, args...)})
}

// endImplicit ends the implicit transaction of a Sync outside a block:
// unnamed and other portals go, as at the end of any transaction.
func (sess *session) endImplicit() {
	if sess.tx == txIdle {
		sess.portals = map[string]*portal{}
	}
}

// beginStatement returns the context a statement runs under: cancelled by
// a CancelRequest, statement_timeout, the endpoint's statement timeout, the
// client going away or the server stopping.
func (sess *session) beginStatement() (context.Context, func()) {
	ctx, cancel := context.WithCancelCause(sess.w.Context())
	var stopTimer func() bool
	if d := sess.set.statementTimeout(); d > 0 && d < sess.srv.cfg.Limits.StatementTimeout {
		t := time.AfterFunc(d, func() { cancel(errStatementTimeout) })
		stopTimer = t.Stop
	} else {
		lim := &sess.srv.cfg.Limits
		t := time.AfterFunc(lim.StatementTimeout, func() { cancel(lim.statementTimeoutError()) })
		stopTimer = t.Stop
	}
	stopWatch := sess.w.WatchClient(cancel)
	sess.mu.Lock()
	sess.cancelStmt = cancel
	sess.mu.Unlock()
	sess.srv.running.Add(1)
	return ctx, func() {
		sess.srv.running.Add(-1)
		sess.mu.Lock()
		sess.cancelStmt = nil
		sess.mu.Unlock()
		stopTimer()
		stopWatch()
		cancel(nil)
	}
}

// Cancel cancels the running statement, if any.
func (sess *session) Cancel(cause error) bool {
	sess.mu.Lock()
	defer sess.mu.Unlock()
	if sess.cancelStmt == nil {
		return false
	}
	sess.cancelStmt(cause)
	return true
}

// statementCanceled is the error of a statement whose context ended.
func statementCanceled(ctx context.Context) error {
	switch cause := context.Cause(ctx); cause {
	case errStatementTimeout:
		return errorf(codeQueryCanceled, "canceling statement due to statement timeout")
	case wire.ErrClientGone:
		return errorf(codeQueryCanceled, "canceling statement because the client disconnected")
	case wire.ErrShutdown:
		return fatalf(codeAdminShutdown, "terminating connection due to administrator command")
	default:
		// The endpoint's own statement timeout carries its error.
		var se *sqlError
		if errors.As(cause, &se) {
			return se
		}
	}
	return errorf(codeQueryCanceled, "canceling statement due to user request")
}
