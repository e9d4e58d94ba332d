package sqlwire

import (
	"context"
	"crypto/rand"
	"crypto/tls"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"net"
	"os"
	"sort"
	"strings"
	"sync"
	"syscall"
	"time"

	"github.com/jackc/pgx/v5/pgproto3"
)

// flushEvery is how many data rows are buffered before they are written.
const flushEvery = 256

type txStatus byte

const (
	txIdle   txStatus = 'I'
	txBlock  txStatus = 'T'
	txFailed txStatus = 'E'
)

// session is one client connection after startup.
type session struct {
	srv    *Server
	conn   net.Conn
	be     *pgproto3.Backend
	log    *slog.Logger
	user   string
	pid    uint32
	secret [4]byte

	set      *settings
	reported map[string]string // last ParameterStatus sent per setting

	tx         txStatus
	txSnapshot *settings // settings at BEGIN, restored by ROLLBACK
	savepoints []savepoint
	cursors    map[string]*cursor
	cursorSeq  int
	prepared   map[string]*prepared
	portals    map[string]*portal
	skipToSync bool // an extended-protocol error: ignore messages until Sync
	fatal      bool // a FATAL error was sent: end the session

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

// serveConn runs one connection from the first byte to close.
func (s *Server) serveConn(conn net.Conn) {
	loggedIn := false
	defer func() {
		if !loggedIn {
			s.unauth.Add(-1)
		}
	}()
	conn.SetDeadline(time.Now().Add(s.cfg.StartupTimeout))
	be := pgproto3.NewBackend(conn, conn)
	be.SetMaxBodyLen(s.cfg.Limits.MaxMessageSize)
	sess, err := s.startup(conn, be)
	if err != nil {
		if sess != nil && sess.be != nil {
			be = sess.be // after TLS, the goodbye goes encrypted
		}
		var se *sqlError
		if errors.As(err, &se) {
			se.Severity = "FATAL"
			be.Send(errorResponse(se))
			be.Flush()
			s.log.Info("sql endpoint connection refused", "remote", conn.RemoteAddr().String(), "code", se.Code, "err", se.Message)
		} else if !isDisconnect(err) {
			s.log.Debug("sql endpoint startup failed", "remote", conn.RemoteAddr().String(), "err", err)
		}
		return
	}
	if sess == nil {
		return // a cancel request, or a client that went away
	}
	loggedIn = true
	s.unauth.Add(-1)
	defer s.unregister(sess)
	sess.loop()
}

// startup handles SSLRequest, GSSENCRequest, CancelRequest and the
// StartupMessage, then authenticates. It returns nil, nil for a cancel
// request.
func (s *Server) startup(conn net.Conn, be *pgproto3.Backend) (*session, error) {
	sess := &session{srv: s, conn: conn, be: be}
	encrypted := false
	for {
		msg, err := be.ReceiveStartupMessage()
		if err != nil {
			if isDisconnect(err) {
				return nil, err
			}
			return sess, fatalf(codeProtocolViolation, "invalid startup packet: %v", err)
		}
		switch m := msg.(type) {
		case *pgproto3.SSLRequest:
			if encrypted {
				return sess, fatalf(codeProtocolViolation, "SSL request on an encrypted connection")
			}
			if s.tls == nil {
				if _, err := conn.Write([]byte{'N'}); err != nil {
					return nil, err
				}
				continue
			}
			if _, err := conn.Write([]byte{'S'}); err != nil {
				return nil, err
			}
			tconn := tls.Server(conn, s.tls)
			if err := tconn.Handshake(); err != nil {
				return nil, fmt.Errorf("TLS handshake: %w", err)
			}
			if !s.retrack(conn, tconn) {
				return nil, errShutdown
			}
			conn = tconn
			be = pgproto3.NewBackend(conn, conn)
			be.SetMaxBodyLen(s.cfg.Limits.MaxMessageSize)
			sess.conn, sess.be = conn, be
			encrypted = true
		case *pgproto3.GSSEncRequest:
			if _, err := conn.Write([]byte{'N'}); err != nil {
				return nil, err
			}
		case *pgproto3.CancelRequest:
			s.cancelRequest(m.ProcessID, m.SecretKey)
			return nil, nil
		case *pgproto3.StartupMessage:
			if s.cfg.RequireTLS && !encrypted {
				return sess, fatalf(codeInvalidAuth, "TLS is required: the sidetrend endpoint refuses connections without TLS").
					withHint("connect with sslmode=require (or verify-ca, verify-full); for postgres_fdw, set sslmode 'require' on the foreign server")
			}
			return sess, sess.begin(m)
		default:
			return sess, fatalf(codeProtocolViolation, "unexpected startup message %T", msg)
		}
	}
}

// begin checks the startup parameters, authenticates and sends the
// greeting: AuthenticationOk, ParameterStatus, BackendKeyData and
// ReadyForQuery.
func (sess *session) begin(m *pgproto3.StartupMessage) error {
	s := sess.srv
	var unknownOpts []string
	for k := range m.Parameters {
		if strings.HasPrefix(k, "_pq_.") {
			unknownOpts = append(unknownOpts, k)
		}
	}
	if m.ProtocolVersion != pgproto3.ProtocolVersion30 || len(unknownOpts) > 0 {
		// Offer protocol 3.0 (no protocol extensions); a 3.2 client
		// carries on with 3.0.
		sort.Strings(unknownOpts)
		sess.be.Send(&pgproto3.NegotiateProtocolVersion{NewestMinorProtocol: 0, UnrecognizedOptions: unknownOpts})
	}
	user := m.Parameters["user"]
	if user == "" {
		return fatalf(codeInvalidAuth, "no PostgreSQL user name specified in startup packet")
	}
	sess.user = user
	sess.log = s.log.With("user", user, "remote", sess.conn.RemoteAddr().String())
	db := m.Parameters["database"]
	if db == "" {
		db = user
	}
	if db != s.cfg.Database {
		return fatalf(codeUnknownDatabase, "database %q does not exist", db).
			withHint("the sidetrend endpoint serves database %q: set dbname '%s' on the foreign server", s.cfg.Database, s.cfg.Database)
	}
	sess.set = newSettings(user)
	for k, v := range m.Parameters {
		switch k {
		case "user", "database", "replication":
			if k == "replication" && v != "false" && v != "off" && v != "0" {
				return fatalf(codeFeatureNotSupported, "replication connections are not supported")
			}
		case "options":
			if err := sess.applyOptions(v); err != nil {
				return err
			}
		default:
			if strings.HasPrefix(k, "_pq_.") {
				continue
			}
			if err := sess.set.set(strings.ToLower(k), v, false); err != nil {
				e := asSQLError(err)
				return fatalf(e.Code, "startup parameter %s: %s", k, e.Message)
			}
		}
	}
	if err := sess.authenticate(); err != nil {
		return err
	}
	if _, err := rand.Read(sess.secret[:]); err != nil {
		return fatalf(codeInternal, "secret key: %v", err)
	}
	ok, full := s.register(sess)
	if full {
		return fatalf(codeTooManyConnections, "sorry, too many clients already: the endpoint allows %d sessions", s.cfg.MaxConnections)
	}
	if !ok {
		return fatalf(codeAdminShutdown, "the sidetrend endpoint is shutting down")
	}
	sess.tx = txIdle
	sess.cursors = map[string]*cursor{}
	sess.prepared = map[string]*prepared{}
	sess.portals = map[string]*portal{}
	sess.reported = map[string]string{}
	sess.be.Send(&pgproto3.AuthenticationOk{})
	for _, st := range settingList {
		if st.reported {
			v := sess.set.get(strings.ToLower(st.name))
			sess.be.Send(&pgproto3.ParameterStatus{Name: st.name, Value: v})
			sess.reported[st.name] = v
		}
	}
	sess.be.Send(&pgproto3.BackendKeyData{ProcessID: sess.pid, SecretKey: sess.secret[:]})
	sess.be.Send(&pgproto3.ReadyForQuery{TxStatus: byte(txIdle)})
	sess.be.SetMaxBodyLen(s.cfg.Limits.MaxMessageSize)
	sess.log = sess.log.With("pid", sess.pid)
	sess.log.Debug("sql endpoint session started")
	return sess.be.Flush()
}

// applyOptions reads the startup "options" parameter: -c name=value and
// --name=value pairs.
func (sess *session) applyOptions(opts string) error {
	fields := strings.Fields(opts)
	for i := 0; i < len(fields); i++ {
		f := fields[i]
		var kv string
		switch {
		case f == "-c" && i+1 < len(fields):
			i++
			kv = fields[i]
		case strings.HasPrefix(f, "-c"):
			kv = f[2:]
		case strings.HasPrefix(f, "--"):
			kv = f[2:]
		default:
			return fatalf(codeFeatureNotSupported, "startup option %q is not supported: use -c name=value", f)
		}
		name, value, ok := strings.Cut(kv, "=")
		if !ok {
			return fatalf(codeSyntax, "startup option %q needs a value: use -c name=value", f)
		}
		if err := sess.set.set(strings.ToLower(strings.ReplaceAll(name, "-", "_")), value, false); err != nil {
			e := asSQLError(err)
			return fatalf(e.Code, "startup option %s: %s", name, e.Message)
		}
	}
	return nil
}

// authenticate runs SCRAM-SHA-256 for the startup user.
func (sess *session) authenticate() error {
	s := sess.srv
	fail := func() error {
		return fatalf(codeInvalidPassword, "password authentication failed for user %q", sess.user)
	}
	sec, known := s.secretFor(sess.user)
	sess.be.Send(&pgproto3.AuthenticationSASL{AuthMechanisms: []string{scramMechanism}})
	if err := sess.be.Flush(); err != nil {
		return err
	}
	if err := sess.be.SetAuthType(pgproto3.AuthTypeSASL); err != nil {
		return err
	}
	msg, err := sess.be.Receive()
	if err != nil {
		return err
	}
	init, ok := msg.(*pgproto3.SASLInitialResponse)
	if !ok {
		return fatalf(codeProtocolViolation, "expected SASL response, got %T", msg)
	}
	if init.AuthMechanism != scramMechanism {
		return fatalf(codeProtocolViolation, "client selected an invalid SASL authentication mechanism %q: use %s", init.AuthMechanism, scramMechanism)
	}
	conv, err := scramServer(sec)
	if err != nil {
		return fatalf(codeInternal, "SCRAM: %v", err)
	}
	serverFirst, err := conv.Step(string(init.Data))
	if err != nil {
		return fatalf(codeProtocolViolation, "malformed SCRAM message: %v", err)
	}
	sess.be.Send(&pgproto3.AuthenticationSASLContinue{Data: []byte(serverFirst)})
	if err := sess.be.Flush(); err != nil {
		return err
	}
	if err := sess.be.SetAuthType(pgproto3.AuthTypeSASLContinue); err != nil {
		return err
	}
	msg, err = sess.be.Receive()
	if err != nil {
		return err
	}
	resp, ok := msg.(*pgproto3.SASLResponse)
	if !ok {
		return fatalf(codeProtocolViolation, "expected SASL response, got %T", msg)
	}
	final, _ := conv.Step(string(resp.Data))
	good := conv.Valid()
	if !good || !known {
		delay := s.authFailures.failed(hostOf(sess.conn.RemoteAddr()))
		sess.log.Info("sql endpoint authentication failed", "known_user", known, "delay", delay)
		t := time.NewTimer(delay)
		defer t.Stop()
		select {
		case <-t.C:
		case <-s.ctx.Done():
		}
		return fail()
	}
	sess.be.Send(&pgproto3.AuthenticationSASLFinal{Data: []byte(final)})
	return sess.be.SetAuthType(pgproto3.AuthTypeOk)
}

func isDisconnect(err error) bool {
	return errors.Is(err, io.EOF) || errors.Is(err, io.ErrUnexpectedEOF) || errors.Is(err, net.ErrClosed) ||
		errors.Is(err, os.ErrDeadlineExceeded) || errors.Is(err, syscall.ECONNRESET) || errors.Is(err, syscall.EPIPE)
}

// loop reads and answers messages until the client leaves or the server
// stops.
func (sess *session) loop() {
	defer sess.closeAll()
	for {
		msg, err := sess.be.Receive()
		if err != nil {
			if sess.srv.ctx.Err() != nil {
				sess.goodbye(fatalf(codeAdminShutdown, "terminating connection due to administrator command"))
				return
			}
			var tooLong *pgproto3.ExceededMaxBodyLenErr
			if errors.As(err, &tooLong) {
				sess.refuseMessage(tooLong.ActualBodyLen)
				return
			}
			if !isDisconnect(err) {
				sess.goodbye(fatalf(codeProtocolViolation, "invalid frontend message: %v", err))
			}
			return
		}
		if sess.srv.ctx.Err() != nil {
			sess.goodbye(fatalf(codeAdminShutdown, "terminating connection due to administrator command"))
			return
		}
		switch m := msg.(type) {
		case *pgproto3.Query:
			sess.simpleQuery(m.String)
		case *pgproto3.Parse:
			sess.extended(func() error { return sess.parse(m) })
		case *pgproto3.Bind:
			sess.extended(func() error { return sess.bind(m) })
		case *pgproto3.Describe:
			sess.extended(func() error { return sess.describe(m) })
		case *pgproto3.Execute:
			sess.extended(func() error { return sess.execute(m) })
		case *pgproto3.Close:
			sess.extended(func() error { return sess.closeObject(m) })
		case *pgproto3.Sync:
			sess.skipToSync = false
			sess.endImplicit()
			sess.readyForQuery()
		case *pgproto3.Flush:
			if err := sess.be.Flush(); err != nil {
				return
			}
		case *pgproto3.Terminate:
			return
		case *pgproto3.FunctionCall:
			sess.extended(func() error { return notSupported("the fast-path function call interface is not supported") })
		case *pgproto3.CopyData, *pgproto3.CopyDone, *pgproto3.CopyFail:
			// Postgres ignores these outside COPY.
		default:
			sess.goodbye(fatalf(codeProtocolViolation, "unexpected frontend message %T", msg))
			return
		}
		if sess.fatal {
			return
		}
	}
}

// goodbye sends a FATAL error and ends the session.
func (sess *session) goodbye(e *sqlError) {
	sess.conn.SetWriteDeadline(time.Now().Add(time.Second))
	sess.be.Send(errorResponse(e))
	sess.be.Flush()
}

func (sess *session) closeAll() {
	sess.cursors = nil
	sess.portals = nil
	sess.log.Debug("sql endpoint session ended")
}

// extended runs one extended-protocol message unless an earlier error is
// waiting for Sync.
func (sess *session) extended(fn func() error) {
	if sess.skipToSync {
		return
	}
	if err := fn(); err != nil {
		sess.sendError(err)
		sess.skipToSync = true
	}
}

// sendError sends an ErrorResponse and marks a transaction block failed.
func (sess *session) sendError(err error) {
	e := asSQLError(err)
	if e.Severity == "FATAL" {
		sess.fatal = true
	}
	sess.be.Send(errorResponse(e))
	if sess.tx == txBlock {
		sess.tx = txFailed
	}
	if e.Code == codeInternal {
		sess.log.Warn("sql endpoint statement failed", "err", e.Message)
	}
}

func errorResponse(e *sqlError) *pgproto3.ErrorResponse {
	sev := e.Severity
	if sev == "" {
		sev = "ERROR"
	}
	return &pgproto3.ErrorResponse{Severity: sev, SeverityUnlocalized: sev, Code: e.Code,
		Message: e.Message, Detail: e.Detail, Hint: e.Hint, Position: int32(e.Position)}
}

func (sess *session) notice(code, format string, args ...any) {
	sess.be.Send(&pgproto3.NoticeResponse{Severity: "WARNING", SeverityUnlocalized: "WARNING", Code: code,
		Message: fmt.Sprintf(format, args...)})
}

func (sess *session) readyForQuery() {
	if sess.fatal {
		sess.be.Flush()
		return
	}
	sess.reportSettings()
	sess.be.Send(&pgproto3.ReadyForQuery{TxStatus: byte(sess.tx)})
	if err := sess.be.Flush(); err != nil {
		sess.fatal = true
	}
}

// reportSettings sends ParameterStatus for reported settings that changed.
func (sess *session) reportSettings() {
	for _, st := range settingList {
		if !st.reported {
			continue
		}
		v := sess.set.get(strings.ToLower(st.name))
		if sess.reported[st.name] != v {
			sess.be.Send(&pgproto3.ParameterStatus{Name: st.name, Value: v})
			sess.reported[st.name] = v
		}
	}
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
	ctx, cancel := context.WithCancelCause(sess.srv.ctx)
	var stopTimer func() bool
	if d := sess.set.statementTimeout(); d > 0 && d < sess.srv.cfg.Limits.StatementTimeout {
		t := time.AfterFunc(d, func() { cancel(errStatementTimeout) })
		stopTimer = t.Stop
	} else {
		lim := &sess.srv.cfg.Limits
		t := time.AfterFunc(lim.StatementTimeout, func() { cancel(lim.statementTimeoutError()) })
		stopTimer = t.Stop
	}
	stopWatch := sess.watchClient(cancel)
	sess.mu.Lock()
	sess.cancelStmt = cancel
	sess.mu.Unlock()
	return ctx, func() {
		sess.mu.Lock()
		sess.cancelStmt = nil
		sess.mu.Unlock()
		stopTimer()
		stopWatch()
		cancel(nil)
	}
}

// cancelStatement cancels the running statement, if any.
func (sess *session) cancelStatement(cause error) bool {
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
	case errClientGone:
		return errorf(codeQueryCanceled, "canceling statement because the client disconnected")
	case errShutdown:
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
