// Package sqlwire is sidetrend's live endpoint: a server of the Postgres
// wire protocol that stock postgres_fdw attaches to, serving forecasts for
// any horizon, what-if refits with another forgetting factor and backtests,
// all computed on demand from the sidecar's stored state.
//
// This package is the query handling: it implements wire.Handler (package
// sqlwire/wire speaks the protocol and authenticates with SCRAM-SHA-256)
// for the subset of SQL that postgres_fdw sends (session SETs,
// transactions and savepoints, cursors over the extended protocol, the
// deparsed SELECTs) over the tables of sqlwire/livetables. Every
// pushed-down condition is either applied exactly or refused with an error
// that names it: Postgres does not check pushed-down conditions again.
package sqlwire

import (
	"context"
	"errors"
	"log/slog"
	"net"
	"sync/atomic"
	"time"

	"github.com/jackc/pgx/v5/pgxpool"
	"github.com/sidetrend/sidetrend/sqlwire/wire"
)

// Config configures the endpoint.
type Config struct {
	// Listen is the TCP address to listen on, such as 127.0.0.1:5488.
	Listen string
	// TLSCertFile and TLSKeyFile, when both set, enable TLS: SSLRequest is
	// answered 'S'. Otherwise it is answered 'N' and connections are plain.
	TLSCertFile, TLSKeyFile string
	// Credentials maps user names to passwords, checked with SCRAM-SHA-256.
	Credentials map[string]string
	// Database is the only database name clients may connect to;
	// "sidetrend" when empty.
	Database string
	// MaxConnections bounds concurrent sessions; 200 when zero.
	MaxConnections int
	// StartupTimeout bounds the time from connect to authenticated; 10 s
	// when zero.
	StartupTimeout time.Duration
	// RequireTLS refuses clients that do not negotiate TLS (FATAL 28000);
	// it needs TLSCertFile and TLSKeyFile.
	RequireTLS bool
	// Limits bound the work of one statement and of clients that have
	// not logged in (limits.go).
	Limits Limits
}

// DefaultDatabase is the database name clients connect to.
const DefaultDatabase = wire.DefaultDatabase

// LoadCredentials reads the endpoint's users and passwords: a file of
// user:password lines, or, when path is empty, the password of user
// wire.DefaultUser from wire.PasswordEnv (wire.LoadCredentials).
func LoadCredentials(path string) (map[string]string, error) { return wire.LoadCredentials(path) }

// Server is the live endpoint.
type Server struct {
	cfg Config
	src Source
	ev  *evaluator
	w   *wire.Server

	running atomic.Int64 // statements running now
}

// New returns a server for cfg that computes its tables from src and has
// db, the sidecar's own database, evaluate the queries over them (any role
// that can connect will do: the queries read no table). Start listens.
func New(cfg Config, src Source, db *pgxpool.Pool, log *slog.Logger) *Server {
	cfg.Limits = cfg.Limits.withDefaults()
	s := &Server{cfg: cfg, src: src, ev: &evaluator{pool: db}}
	s.w = wire.New(wire.Config{
		Listen:              cfg.Listen,
		TLSCertFile:         cfg.TLSCertFile,
		TLSKeyFile:          cfg.TLSKeyFile,
		Credentials:         cfg.Credentials,
		Database:            cfg.Database,
		MaxConnections:      cfg.MaxConnections,
		StartupTimeout:      cfg.StartupTimeout,
		RequireTLS:          cfg.RequireTLS,
		MaxMessageSize:      cfg.Limits.MaxMessageSize,
		MaxUnauthenticated:  cfg.Limits.MaxUnauthenticated,
		AuthFailureDelay:    cfg.Limits.AuthFailureDelay,
		AuthFailureMaxDelay: cfg.Limits.AuthFailureMaxDelay,
	}, handler{s}, log)
	return s
}

// errStatementTimeout is the cause of a statement that ran past
// statement_timeout.
var errStatementTimeout = errors.New("statement timeout")

// Start checks the configuration, compiles the parser, derives the SCRAM
// secrets and starts listening. It fails fast on a bad address, unreadable
// TLS files, missing credentials, a missing source or database. The server
// runs until Stop or until ctx is done.
func (s *Server) Start(ctx context.Context) error {
	if s.src == nil {
		return errors.New("sqlwire: no source: the endpoint needs the sidecar's state to serve")
	}
	if err := s.cfg.Limits.check(); err != nil {
		return err
	}
	if s.cfg.RequireTLS && (s.cfg.TLSCertFile == "" || s.cfg.TLSKeyFile == "") {
		return errors.New("sqlwire: TLS is required but no certificate is configured: give a certificate and key (--tls-cert, --tls-key) or turn off --sql-require-tls")
	}
	if s.ev.pool == nil {
		return errors.New("sqlwire: no database: the endpoint evaluates queries in the sidecar's Postgres")
	}
	// The parser's WebAssembly module compiles once per process (seconds
	// on two cores): here rather than in the first client's statement.
	warmGrammar()
	return s.w.Start(ctx)
}

// Addr is the address the server listens on (nil before Start).
func (s *Server) Addr() net.Addr { return s.w.Addr() }

// Stop stops accepting connections, cancels running statements, ends every
// session with FATAL 57P01 and waits for them to close. It is idempotent
// and safe to call before Start.
func (s *Server) Stop() { s.w.Stop() }

// Unauthenticated is the number of connections that have not logged in
// yet.
func (s *Server) Unauthenticated() int { return s.w.Unauthenticated() }

// RefusedUnauthenticated is the number of connections closed at once since
// Start because MaxUnauthenticated others had not logged in yet.
func (s *Server) RefusedUnauthenticated() int64 { return s.w.RefusedUnauthenticated() }

// Sessions is the number of authenticated sessions open now.
func (s *Server) Sessions() int { return s.w.Sessions() }

// CancelsHonored is the number of cancel requests that stopped a running
// statement since Start.
func (s *Server) CancelsHonored() int64 { return s.w.CancelsHonored() }

// handler is the Server's side of wire.Handler.
type handler struct{ srv *Server }

func (h handler) Open(c *wire.Conn) wire.Session {
	return &session{srv: h.srv, w: c, set: newSettings(c.User()), tx: txIdle,
		cursors: map[string]*cursor{}, prepared: map[string]*prepared{}, portals: map[string]*portal{}}
}
