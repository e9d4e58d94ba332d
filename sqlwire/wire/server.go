// Package wire is the protocol side of sidetrend's live endpoint: it
// accepts connections, negotiates TLS, authenticates with SCRAM-SHA-256,
// keeps the registry of sessions that cancel requests look up, bounds what
// clients that have not logged in may cost, and reads and frames the
// messages of the Postgres wire protocol 3.0. What the messages mean is
// the Handler's: a query-handling package implements it.
//
// Package wire imports neither the query handling nor the tables.
package wire

import (
	"context"
	"crypto/rand"
	"crypto/subtle"
	"crypto/tls"
	"encoding/binary"
	"errors"
	"fmt"
	"log/slog"
	"net"
	"sync"
	"sync/atomic"
	"time"

	"github.com/xdg-go/scram"
)

// Config configures the protocol side of the endpoint. A zero field takes
// the default named in its comment.
type Config struct {
	// Listen is the TCP address to listen on, such as 127.0.0.1:5488.
	Listen string
	// TLSCertFile and TLSKeyFile, when both set, enable TLS: SSLRequest is
	// answered 'S'. Otherwise it is answered 'N' and connections are plain.
	TLSCertFile, TLSKeyFile string
	// Credentials maps user names to passwords, checked with SCRAM-SHA-256.
	Credentials map[string]string
	// Database is the only database name clients may connect to;
	// DefaultDatabase when empty.
	Database string
	// MaxConnections bounds concurrent sessions; 200.
	MaxConnections int
	// StartupTimeout bounds the time from connect to authenticated; 10 s.
	StartupTimeout time.Duration
	// RequireTLS refuses clients that do not negotiate TLS (FATAL 28000);
	// it needs TLSCertFile and TLSKeyFile.
	RequireTLS bool
	// MaxMessageSize bounds one frontend message in bytes;
	// DefaultMaxMessageSize. Longer ones are refused before they are read.
	MaxMessageSize int
	// MaxUnauthenticated bounds the connections that have not logged in
	// yet; DefaultMaxUnauthenticated. Beyond it new connections are closed
	// at once.
	MaxUnauthenticated int
	// AuthFailureDelay is the delay after the first failed login from an
	// address; DefaultAuthFailureDelay. Each further failure doubles it up
	// to AuthFailureMaxDelay (DefaultAuthFailureMaxDelay); a minute without
	// failures from the address forgets them.
	AuthFailureDelay, AuthFailureMaxDelay time.Duration
}

// DefaultDatabase is the database name clients connect to.
const DefaultDatabase = "sidetrend"

// Defaults of Config.
const (
	DefaultMaxMessageSize      = 1 << 20
	DefaultMaxUnauthenticated  = 64
	DefaultAuthFailureDelay    = 250 * time.Millisecond
	DefaultAuthFailureMaxDelay = 5 * time.Second
)

// Server accepts and authenticates clients and runs each session's
// message loop, handing the messages to its Handler.
type Server struct {
	cfg Config
	h   Handler
	log *slog.Logger

	mu       sync.Mutex
	ln       net.Listener
	tls      *tls.Config
	secrets  map[string]scram.StoredCredentials
	fakeKey  []byte // keys fake SCRAM salts for unknown users
	sessions map[uint32]*Conn
	conns    map[net.Conn]struct{}
	nextPID  uint32
	started  bool
	stopped  bool
	ctx      context.Context
	cancel   context.CancelCauseFunc
	wg       sync.WaitGroup
	stopOnce sync.Once

	cancels atomic.Int64 // cancel requests that stopped a running statement

	unauth         atomic.Int64 // connections that have not logged in yet
	unauthRefused  atomic.Int64 // connections closed because of MaxUnauthenticated
	lastRefusalLog atomic.Int64 // unix nanoseconds of the last refusal logged
	authFailures   *authThrottle
}

// New returns a server for cfg whose sessions h handles. Start listens.
func New(cfg Config, h Handler, log *slog.Logger) *Server {
	if log == nil {
		log = slog.New(slog.DiscardHandler)
	}
	if cfg.Database == "" {
		cfg.Database = DefaultDatabase
	}
	if cfg.MaxConnections == 0 {
		cfg.MaxConnections = 200
	}
	if cfg.StartupTimeout == 0 {
		cfg.StartupTimeout = 10 * time.Second
	}
	if cfg.MaxMessageSize == 0 {
		cfg.MaxMessageSize = DefaultMaxMessageSize
	}
	if cfg.MaxUnauthenticated == 0 {
		cfg.MaxUnauthenticated = DefaultMaxUnauthenticated
	}
	if cfg.AuthFailureDelay == 0 {
		cfg.AuthFailureDelay = DefaultAuthFailureDelay
	}
	if cfg.AuthFailureMaxDelay == 0 {
		cfg.AuthFailureMaxDelay = DefaultAuthFailureMaxDelay
	}
	return &Server{cfg: cfg, h: h, log: log,
		sessions: map[uint32]*Conn{}, conns: map[net.Conn]struct{}{},
		authFailures: newAuthThrottle(cfg.AuthFailureDelay, cfg.AuthFailureMaxDelay, maxAuthAddresses)}
}

// Start checks the configuration, derives the SCRAM secrets and starts
// listening. It fails fast on a bad address, unreadable TLS files or
// missing credentials. The server runs until Stop or until ctx is done.
func (s *Server) Start(ctx context.Context) error {
	s.mu.Lock()
	defer s.mu.Unlock()
	if s.started {
		return errors.New("sqlwire: the server is already started")
	}
	if s.h == nil {
		return errors.New("sqlwire: no handler: the protocol needs a query handler to serve")
	}
	if s.cfg.Listen == "" {
		return errors.New("sqlwire: no listen address: set one such as 127.0.0.1:5488")
	}
	if s.cfg.RequireTLS && (s.cfg.TLSCertFile == "" || s.cfg.TLSKeyFile == "") {
		return errors.New("sqlwire: TLS is required but no certificate is configured: give a certificate and key (--tls-cert, --tls-key) or turn off --sql-require-tls")
	}
	if len(s.cfg.Credentials) == 0 {
		return errors.New("sqlwire: no credentials: give at least one user:password, for example through SIDETREND_SQL_PASSWORD")
	}
	secrets := map[string]scram.StoredCredentials{}
	for user, pw := range s.cfg.Credentials {
		if user == "" {
			return errors.New("sqlwire: a credential has an empty user name: write user:password")
		}
		if pw == "" {
			return fmt.Errorf("sqlwire: user %q has an empty password: postgres_fdw requires a password for non-superusers", user)
		}
		salt := make([]byte, scramSaltLen)
		if _, err := rand.Read(salt); err != nil {
			return fmt.Errorf("sqlwire: SCRAM salt: %w", err)
		}
		sec, err := newScramSecret(pw, salt, scramIterations)
		if err != nil {
			return fmt.Errorf("sqlwire: %w", err)
		}
		secrets[user] = sec
	}
	s.fakeKey = make([]byte, 32)
	if _, err := rand.Read(s.fakeKey); err != nil {
		return fmt.Errorf("sqlwire: %w", err)
	}
	switch {
	case s.cfg.TLSCertFile != "" && s.cfg.TLSKeyFile != "":
		cert, err := tls.LoadX509KeyPair(s.cfg.TLSCertFile, s.cfg.TLSKeyFile)
		if err != nil {
			return fmt.Errorf("sqlwire: load TLS certificate %s and key %s: %w", s.cfg.TLSCertFile, s.cfg.TLSKeyFile, err)
		}
		s.tls = &tls.Config{Certificates: []tls.Certificate{cert}, MinVersion: tls.VersionTLS12}
	case s.cfg.TLSCertFile != "" || s.cfg.TLSKeyFile != "":
		return errors.New("sqlwire: TLS needs both a certificate file and a key file")
	}
	var lc net.ListenConfig
	ln, err := lc.Listen(ctx, "tcp", s.cfg.Listen)
	if err != nil {
		return fmt.Errorf("sqlwire: listen on %s: %w", s.cfg.Listen, err)
	}
	var pid [4]byte
	if _, err := rand.Read(pid[:]); err != nil {
		ln.Close()
		return fmt.Errorf("sqlwire: %w", err)
	}
	s.nextPID = 1000 + binary.BigEndian.Uint32(pid[:])%1_000_000
	s.secrets = secrets
	s.ln = ln
	s.started = true
	s.ctx, s.cancel = context.WithCancelCause(context.WithoutCancel(ctx))
	s.wg.Add(1)
	go s.acceptLoop()
	if ctx.Done() != nil {
		go func() {
			select {
			case <-ctx.Done():
				s.Stop()
			case <-s.ctx.Done():
			}
		}()
	}
	s.log.Info("sql endpoint listening", "addr", ln.Addr().String(), "tls", s.tls != nil, "require_tls", s.cfg.RequireTLS)
	return nil
}

// Addr is the address the server listens on (nil before Start).
func (s *Server) Addr() net.Addr {
	s.mu.Lock()
	defer s.mu.Unlock()
	if s.ln == nil {
		return nil
	}
	return s.ln.Addr()
}

// Stop stops accepting connections, cancels the server's context (with
// cause ErrShutdown), ends every session with FATAL 57P01 and waits for
// them to close. It is idempotent and safe to call before Start.
func (s *Server) Stop() {
	s.stopOnce.Do(func() {
		s.mu.Lock()
		s.stopped = true
		if s.ln != nil {
			s.ln.Close()
		}
		if s.cancel != nil {
			s.cancel(ErrShutdown)
		}
		// Wake sessions blocked reading: they see the stop and say goodbye.
		now := time.Now()
		for c := range s.conns {
			c.SetReadDeadline(now)
		}
		s.mu.Unlock()
		s.wg.Wait()
		s.log.Info("sql endpoint stopped")
	})
}

// Unauthenticated is the number of connections that have not logged in
// yet.
func (s *Server) Unauthenticated() int { return int(s.unauth.Load()) }

// RefusedUnauthenticated is the number of connections closed at once since
// Start because MaxUnauthenticated others had not logged in yet.
func (s *Server) RefusedUnauthenticated() int64 { return s.unauthRefused.Load() }

// Sessions is the number of authenticated sessions open now.
func (s *Server) Sessions() int {
	s.mu.Lock()
	defer s.mu.Unlock()
	return len(s.sessions)
}

// FailedLoginAddresses is the number of client addresses whose failed
// logins are remembered (and delay their next answer) now.
func (s *Server) FailedLoginAddresses() int { return s.authFailures.len() }

// CancelsHonored is the number of cancel requests that stopped a running
// statement since Start.
func (s *Server) CancelsHonored() int64 { return s.cancels.Load() }

func (s *Server) acceptLoop() {
	defer s.wg.Done()
	var delay time.Duration
	for {
		conn, err := s.ln.Accept()
		if err != nil {
			s.mu.Lock()
			stopped := s.stopped
			s.mu.Unlock()
			if stopped || errors.Is(err, net.ErrClosed) {
				return
			}
			// Temporary failures (too many open files): back off, retry.
			delay = min(max(2*delay, 5*time.Millisecond), time.Second)
			s.log.Warn("sql endpoint accept failed", "err", err, "retry_in", delay)
			time.Sleep(delay)
			continue
		}
		delay = 0
		if !s.admitUnauthenticated(conn) {
			continue
		}
		if !s.track(conn) {
			s.unauth.Add(-1)
			conn.Close()
			continue
		}
		s.wg.Add(1)
		go func() {
			defer s.wg.Done()
			defer s.untrack(conn)
			s.serveConn(conn)
		}()
	}
}

// track registers a connection so that Stop can wake it; false when the
// server is stopping.
func (s *Server) track(c net.Conn) bool {
	s.mu.Lock()
	defer s.mu.Unlock()
	if s.stopped {
		return false
	}
	s.conns[c] = struct{}{}
	return true
}

func (s *Server) untrack(c net.Conn) {
	s.mu.Lock()
	delete(s.conns, c)
	s.mu.Unlock()
	c.Close()
}

// retrack replaces a tracked connection by its TLS wrapper.
func (s *Server) retrack(old, c net.Conn) bool {
	s.mu.Lock()
	defer s.mu.Unlock()
	delete(s.conns, old)
	if s.stopped {
		return false
	}
	s.conns[c] = struct{}{}
	return true
}

// register gives an authenticated session its process id and secret key;
// false when the server is stopping or full.
func (s *Server) register(c *Conn) (ok bool, full bool) {
	s.mu.Lock()
	defer s.mu.Unlock()
	if s.stopped {
		return false, false
	}
	if len(s.sessions) >= s.cfg.MaxConnections {
		return false, true
	}
	for {
		s.nextPID++
		if s.nextPID == 0 {
			s.nextPID = 1000
		}
		if _, taken := s.sessions[s.nextPID]; !taken {
			break
		}
	}
	c.pid = s.nextPID
	s.sessions[c.pid] = c
	// The connection must not time out now that startup is over, unless
	// Stop has already set a deadline (it holds mu while doing so).
	c.conn.SetDeadline(time.Time{})
	return true, false
}

func (s *Server) unregister(c *Conn) {
	s.mu.Lock()
	if s.sessions[c.pid] == c {
		delete(s.sessions, c.pid)
	}
	s.mu.Unlock()
}

// cancelRequest handles a CancelRequest: the matching session's running
// statement, if any, is cancelled. As in Postgres nothing is sent back.
func (s *Server) cancelRequest(pid uint32, secret []byte) {
	s.mu.Lock()
	c := s.sessions[pid]
	s.mu.Unlock()
	if c == nil || subtle.ConstantTimeCompare(c.secret[:], secret) != 1 {
		s.log.Warn("sql endpoint cancel request for an unknown session", "pid", pid)
		return
	}
	if c.sess.Cancel(ErrCancelRequest) {
		s.cancels.Add(1)
		s.log.Info("sql endpoint statement cancelled by request", "pid", pid, "user", c.user)
	}
}
