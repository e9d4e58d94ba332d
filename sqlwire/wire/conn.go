package wire

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
	"syscall"
	"time"

	"github.com/jackc/pgx/v5/pgproto3"
)

// Handler gives each client a Session: what its statements mean.
type Handler interface {
	// Open starts the query side of the session of c.User(), after the
	// startup packet was read and before authentication; the startup
	// parameters then arrive through SetParameter.
	Open(c *Conn) Session
}

// Session is the query side of one client session. Its methods run on the
// session's goroutine, one at a time, except Cancel. An error a method
// returns goes to the client as an ErrorResponse (an *Error with its
// SQLSTATE, anything else as XX000); after every error sent, Failed is
// called. A FATAL error ends the session.
type Session interface {
	// SetParameter sets a startup parameter or a -c option (name in lower
	// case).
	SetParameter(name, value string) error
	// Reported is what ParameterStatus reports now, in a fixed order; the
	// greeting sends all of it and ReadyForQuery what changed.
	Reported() []Parameter
	// TxStatus is the transaction status ReadyForQuery sends: 'I', 'T' or
	// 'E'.
	TxStatus() byte
	// SimpleQuery runs a Query message's statements until one fails and
	// returns its error; ReadyForQuery follows.
	SimpleQuery(sql string) error
	// The extended protocol. After an error the messages up to Sync are
	// dropped without reaching the Session.
	Parse(*pgproto3.Parse) error
	Bind(*pgproto3.Bind) error
	Describe(*pgproto3.Describe) error
	Execute(*pgproto3.Execute) error
	Close(*pgproto3.Close) error
	// Sync ends the implicit transaction of the extended protocol;
	// ReadyForQuery follows.
	Sync()
	// Failed says an error was sent: an open transaction block fails.
	Failed()
	// Cancel cancels the running statement, if any, with cause (from
	// another goroutine) and reports whether there was one.
	Cancel(cause error) bool
	// End is called once when the session ends.
	End()
}

// Parameter is a reported setting.
type Parameter struct{ Name, Value string }

// Conn is the protocol side of one client connection, for its Session.
type Conn struct {
	srv    *Server
	conn   net.Conn
	be     *pgproto3.Backend
	log    *slog.Logger
	user   string
	pid    uint32
	secret [4]byte
	sess   Session

	reported   map[string]string // last ParameterStatus sent per setting
	skipToSync bool              // an extended-protocol error: ignore messages until Sync
	fatal      bool              // a FATAL error was sent: end the session
}

// User is the user the session authenticated as.
func (c *Conn) User() string { return c.user }

// Log is the session's logger (user, remote address and, once logged in,
// process id).
func (c *Conn) Log() *slog.Logger { return c.log }

// Context is the server's: cancelled with cause ErrShutdown by Stop.
// Statements run under contexts derived from it.
func (c *Conn) Context() context.Context { return c.srv.ctx }

// Send buffers a message to the client.
func (c *Conn) Send(msg pgproto3.BackendMessage) { c.be.Send(msg) }

// Flush writes the buffered messages.
func (c *Conn) Flush() error { return c.be.Flush() }

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
	be.SetMaxBodyLen(s.cfg.MaxMessageSize)
	c, err := s.startup(conn, be)
	if err != nil {
		if c != nil && c.be != nil {
			be = c.be // after TLS, the goodbye goes encrypted
		}
		var se *Error
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
	if c == nil {
		return // a cancel request, or a client that went away
	}
	loggedIn = true
	s.unauth.Add(-1)
	defer s.unregister(c)
	c.loop()
}

// startup handles SSLRequest, GSSENCRequest, CancelRequest and the
// StartupMessage, then authenticates. It returns nil, nil for a cancel
// request.
func (s *Server) startup(conn net.Conn, be *pgproto3.Backend) (*Conn, error) {
	c := &Conn{srv: s, conn: conn, be: be}
	encrypted := false
	for {
		msg, err := be.ReceiveStartupMessage()
		if err != nil {
			if isDisconnect(err) {
				return nil, err
			}
			return c, Fatalf(codeProtocolViolation, "invalid startup packet: %v", err)
		}
		switch m := msg.(type) {
		case *pgproto3.SSLRequest:
			if encrypted {
				return c, Fatalf(codeProtocolViolation, "SSL request on an encrypted connection")
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
				return nil, ErrShutdown
			}
			conn = tconn
			be = pgproto3.NewBackend(conn, conn)
			be.SetMaxBodyLen(s.cfg.MaxMessageSize)
			c.conn, c.be = conn, be
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
				return c, Fatalf(codeInvalidAuth, "TLS is required: the sidetrend endpoint refuses connections without TLS").
					WithHint("connect with sslmode=require (or verify-ca, verify-full); for postgres_fdw, set sslmode 'require' on the foreign server")
			}
			return c, c.begin(m)
		default:
			return c, Fatalf(codeProtocolViolation, "unexpected startup message %T", msg)
		}
	}
}

// begin checks the startup parameters, authenticates and sends the
// greeting: AuthenticationOk, ParameterStatus, BackendKeyData and
// ReadyForQuery.
func (c *Conn) begin(m *pgproto3.StartupMessage) error {
	s := c.srv
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
		c.be.Send(&pgproto3.NegotiateProtocolVersion{NewestMinorProtocol: 0, UnrecognizedOptions: unknownOpts})
	}
	user := m.Parameters["user"]
	if user == "" {
		return Fatalf(codeInvalidAuth, "no PostgreSQL user name specified in startup packet")
	}
	c.user = user
	c.log = s.log.With("user", user, "remote", c.conn.RemoteAddr().String())
	db := m.Parameters["database"]
	if db == "" {
		db = user
	}
	if db != s.cfg.Database {
		return Fatalf(codeUnknownDatabase, "database %q does not exist", db).
			WithHint("the sidetrend endpoint serves database %q: set dbname '%s' on the foreign server", s.cfg.Database, s.cfg.Database)
	}
	c.sess = s.h.Open(c)
	for k, v := range m.Parameters {
		switch k {
		case "user", "database", "replication":
			if k == "replication" && v != "false" && v != "off" && v != "0" {
				return Fatalf(codeFeatureNotSupported, "replication connections are not supported")
			}
		case "options":
			if err := c.applyOptions(v); err != nil {
				return err
			}
		default:
			if strings.HasPrefix(k, "_pq_.") {
				continue
			}
			if err := c.sess.SetParameter(strings.ToLower(k), v); err != nil {
				e := AsError(err)
				return Fatalf(e.Code, "startup parameter %s: %s", k, e.Message)
			}
		}
	}
	if err := c.authenticate(); err != nil {
		return err
	}
	if _, err := rand.Read(c.secret[:]); err != nil {
		return Fatalf(codeInternal, "secret key: %v", err)
	}
	ok, full := s.register(c)
	if full {
		return Fatalf(codeTooManyConnections, "sorry, too many clients already: the endpoint allows %d sessions", s.cfg.MaxConnections)
	}
	if !ok {
		return Fatalf(codeAdminShutdown, "the sidetrend endpoint is shutting down")
	}
	c.reported = map[string]string{}
	c.be.Send(&pgproto3.AuthenticationOk{})
	for _, p := range c.sess.Reported() {
		c.be.Send(&pgproto3.ParameterStatus{Name: p.Name, Value: p.Value})
		c.reported[p.Name] = p.Value
	}
	c.be.Send(&pgproto3.BackendKeyData{ProcessID: c.pid, SecretKey: c.secret[:]})
	c.be.Send(&pgproto3.ReadyForQuery{TxStatus: c.sess.TxStatus()})
	c.be.SetMaxBodyLen(s.cfg.MaxMessageSize)
	c.log = c.log.With("pid", c.pid)
	c.log.Debug("sql endpoint session started")
	return c.be.Flush()
}

// applyOptions reads the startup "options" parameter: -c name=value and
// --name=value pairs.
func (c *Conn) applyOptions(opts string) error {
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
			return Fatalf(codeFeatureNotSupported, "startup option %q is not supported: use -c name=value", f)
		}
		name, value, ok := strings.Cut(kv, "=")
		if !ok {
			return Fatalf(codeSyntax, "startup option %q needs a value: use -c name=value", f)
		}
		if err := c.sess.SetParameter(strings.ToLower(strings.ReplaceAll(name, "-", "_")), value); err != nil {
			e := AsError(err)
			return Fatalf(e.Code, "startup option %s: %s", name, e.Message)
		}
	}
	return nil
}

// authenticate runs SCRAM-SHA-256 for the startup user.
func (c *Conn) authenticate() error {
	s := c.srv
	fail := func() error {
		return Fatalf(codeInvalidPassword, "password authentication failed for user %q", c.user)
	}
	sec, known := s.secretFor(c.user)
	c.be.Send(&pgproto3.AuthenticationSASL{AuthMechanisms: []string{scramMechanism}})
	if err := c.be.Flush(); err != nil {
		return err
	}
	if err := c.be.SetAuthType(pgproto3.AuthTypeSASL); err != nil {
		return err
	}
	msg, err := c.be.Receive()
	if err != nil {
		return err
	}
	init, ok := msg.(*pgproto3.SASLInitialResponse)
	if !ok {
		return Fatalf(codeProtocolViolation, "expected SASL response, got %T", msg)
	}
	if init.AuthMechanism != scramMechanism {
		return Fatalf(codeProtocolViolation, "client selected an invalid SASL authentication mechanism %q: use %s", init.AuthMechanism, scramMechanism)
	}
	conv, err := scramServer(sec)
	if err != nil {
		return Fatalf(codeInternal, "SCRAM: %v", err)
	}
	serverFirst, err := conv.Step(string(init.Data))
	if err != nil {
		return Fatalf(codeProtocolViolation, "malformed SCRAM message: %v", err)
	}
	c.be.Send(&pgproto3.AuthenticationSASLContinue{Data: []byte(serverFirst)})
	if err := c.be.Flush(); err != nil {
		return err
	}
	if err := c.be.SetAuthType(pgproto3.AuthTypeSASLContinue); err != nil {
		return err
	}
	msg, err = c.be.Receive()
	if err != nil {
		return err
	}
	resp, ok := msg.(*pgproto3.SASLResponse)
	if !ok {
		return Fatalf(codeProtocolViolation, "expected SASL response, got %T", msg)
	}
	final, _ := conv.Step(string(resp.Data))
	good := conv.Valid()
	if !good || !known {
		delay := s.authFailures.failed(hostOf(c.conn.RemoteAddr()))
		c.log.Info("sql endpoint authentication failed", "known_user", known, "delay", delay)
		t := time.NewTimer(delay)
		defer t.Stop()
		select {
		case <-t.C:
		case <-s.ctx.Done():
		}
		return fail()
	}
	c.be.Send(&pgproto3.AuthenticationSASLFinal{Data: []byte(final)})
	return c.be.SetAuthType(pgproto3.AuthTypeOk)
}

func isDisconnect(err error) bool {
	return errors.Is(err, io.EOF) || errors.Is(err, io.ErrUnexpectedEOF) || errors.Is(err, net.ErrClosed) ||
		errors.Is(err, os.ErrDeadlineExceeded) || errors.Is(err, syscall.ECONNRESET) || errors.Is(err, syscall.EPIPE)
}

// loop reads messages and hands them to the Session until the client
// leaves or the server stops.
func (c *Conn) loop() {
	defer c.end()
	for {
		msg, err := c.be.Receive()
		if err != nil {
			if c.srv.ctx.Err() != nil {
				c.goodbye(Fatalf(codeAdminShutdown, "terminating connection due to administrator command"))
				return
			}
			var tooLong *pgproto3.ExceededMaxBodyLenErr
			if errors.As(err, &tooLong) {
				c.refuseMessage(tooLong.ActualBodyLen)
				return
			}
			if !isDisconnect(err) {
				c.goodbye(Fatalf(codeProtocolViolation, "invalid frontend message: %v", err))
			}
			return
		}
		if c.srv.ctx.Err() != nil {
			c.goodbye(Fatalf(codeAdminShutdown, "terminating connection due to administrator command"))
			return
		}
		switch m := msg.(type) {
		case *pgproto3.Query:
			if err := c.sess.SimpleQuery(m.String); err != nil {
				c.sendError(err)
			}
			c.readyForQuery()
		case *pgproto3.Parse:
			c.extended(func() error { return c.sess.Parse(m) })
		case *pgproto3.Bind:
			c.extended(func() error { return c.sess.Bind(m) })
		case *pgproto3.Describe:
			c.extended(func() error { return c.sess.Describe(m) })
		case *pgproto3.Execute:
			c.extended(func() error { return c.sess.Execute(m) })
		case *pgproto3.Close:
			c.extended(func() error { return c.sess.Close(m) })
		case *pgproto3.Sync:
			c.skipToSync = false
			c.sess.Sync()
			c.readyForQuery()
		case *pgproto3.Flush:
			if err := c.be.Flush(); err != nil {
				return
			}
		case *pgproto3.Terminate:
			return
		case *pgproto3.FunctionCall:
			c.extended(func() error {
				return Errorf(codeFeatureNotSupported, "the fast-path function call interface is not supported")
			})
		case *pgproto3.CopyData, *pgproto3.CopyDone, *pgproto3.CopyFail:
			// Postgres ignores these outside COPY.
		default:
			c.goodbye(Fatalf(codeProtocolViolation, "unexpected frontend message %T", msg))
			return
		}
		if c.fatal {
			return
		}
	}
}

// goodbye sends a FATAL error and ends the session.
func (c *Conn) goodbye(e *Error) {
	c.conn.SetWriteDeadline(time.Now().Add(time.Second))
	c.be.Send(errorResponse(e))
	c.be.Flush()
}

func (c *Conn) end() {
	c.sess.End()
	c.log.Debug("sql endpoint session ended")
}

// extended runs one extended-protocol message unless an earlier error is
// waiting for Sync.
func (c *Conn) extended(fn func() error) {
	if c.skipToSync {
		return
	}
	if err := fn(); err != nil {
		c.sendError(err)
		c.skipToSync = true
	}
}

// sendError sends an ErrorResponse and tells the Session.
func (c *Conn) sendError(err error) {
	e := AsError(err)
	if e.Severity == "FATAL" {
		c.fatal = true
	}
	c.be.Send(errorResponse(e))
	c.sess.Failed()
	if e.Code == codeInternal {
		c.log.Warn("sql endpoint statement failed", "err", e.Message)
	}
}

func (c *Conn) readyForQuery() {
	if c.fatal {
		c.be.Flush()
		return
	}
	c.reportSettings()
	c.be.Send(&pgproto3.ReadyForQuery{TxStatus: c.sess.TxStatus()})
	if err := c.be.Flush(); err != nil {
		c.fatal = true
	}
}

// reportSettings sends ParameterStatus for reported settings that changed.
func (c *Conn) reportSettings() {
	for _, p := range c.sess.Reported() {
		if c.reported[p.Name] != p.Value {
			c.be.Send(&pgproto3.ParameterStatus{Name: p.Name, Value: p.Value})
			c.reported[p.Name] = p.Value
		}
	}
}
