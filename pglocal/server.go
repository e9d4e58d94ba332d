// Package pglocal runs a private PostgreSQL cluster on this machine: for the
// tests, for the demo, and as the embedded default of `sidetrend run`.
//
// Start runs initdb when the data directory is new, starts the postmaster as
// a child process listening on 127.0.0.1 only, and returns once a real
// connection succeeds. Postgres refuses to run as root, so when this process
// is root the server runs as the unprivileged OS user ServerUser, created on
// first use. Authentication is trust: whoever reaches the port or the socket
// is the superuser "postgres". That suits a private cluster for tests and
// demos, and nothing more.
package pglocal

import (
	"context"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"net"
	"net/url"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"slices"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"time"

	"github.com/jackc/pgx/v5"
)

// Config says where and how to run the server.
type Config struct {
	// DataDir is the cluster's data directory. "" makes a new temporary one,
	// removed by Stop. A directory without PG_VERSION is initialised with
	// initdb; an initialised one is started as it is; one whose server is
	// already running is used without starting another.
	DataDir string
	// Port is the TCP port on 127.0.0.1; 0 picks a free one.
	Port int
	// Settings are extra server settings passed on the postgres command
	// line, e.g. {"fsync": "off"}. They override the defaults pglocal sets
	// (max_connections = 200) but may not set what pglocal owns: port,
	// listen_addresses, unix_socket_directories and the file locations.
	// With fsync "off", initdb also skips its final sync.
	Settings map[string]string
	// Logger receives progress messages; nil discards them.
	Logger *slog.Logger
}

// DefaultMaxConnections is the max_connections a server gets unless
// Settings say otherwise: the tests run 50 concurrent sessions plus pools.
const DefaultMaxConnections = 200

// startTimeout bounds how long Start and Restart wait for the server to
// accept connections, unless their context ends sooner. Crash recovery
// after an immediate restart is part of that wait.
const startTimeout = 60 * time.Second

// portAttempts is how many free ports Start tries when it picks the port
// and another process takes it between the pick and the server's bind.
const portAttempts = 5

// reservedSettings are the settings pglocal sets itself, with what to use
// instead.
var reservedSettings = map[string]string{
	"port":                    "use Config.Port",
	"listen_addresses":        "the server listens on 127.0.0.1 only",
	"unix_socket_directories": "the socket goes in the data directory (see Server.SocketDir)",
	"data_directory":          "use Config.DataDir",
	"config_file":             "pass settings in Config.Settings",
	"hba_file":                "authentication is trust, by design",
	"ident_file":              "authentication is trust, by design",
}

var settingName = regexp.MustCompile(`^[A-Za-z_][A-Za-z0-9_.]*$`)

// Server is a running private Postgres cluster. Its methods are safe for
// concurrent use.
type Server struct {
	log       *slog.Logger
	binDir    string
	dataDir   string
	socketDir string
	port      int
	logPath   string
	account   *account
	env       []string
	settings  []string // "name=value", in the order they are passed

	tempBase   string // a temporary directory holding the cluster, or ""
	tempSocket string // a temporary socket directory, or ""

	mu       sync.Mutex
	pm       *postmaster // the server this package started; nil when reused
	pid      int         // postmaster pid, also for a reused server
	logFile  *os.File
	detached bool
	stopped  bool
}

// Start starts a private server as cfg says and returns once it accepts
// connections. On failure no server it started is left running, its
// temporary directories are gone, and the error includes the end of the
// server log.
func Start(ctx context.Context, cfg Config) (*Server, error) {
	log := cfg.Logger
	if log == nil {
		log = slog.New(slog.DiscardHandler)
	}
	if cfg.Port < 0 || cfg.Port > 65535 {
		return nil, fmt.Errorf("pglocal: port %d is not a TCP port: use 1 to 65535, or 0 for a free one", cfg.Port)
	}
	settings, err := serverSettings(cfg.Settings)
	if err != nil {
		return nil, err
	}
	binDir, err := FindBinDir()
	if err != nil {
		return nil, err
	}
	acct, err := serverAccount(ctx)
	if err != nil {
		return nil, err
	}
	s := &Server{
		log:      log,
		binDir:   binDir,
		account:  acct,
		env:      childEnv(),
		settings: settings,
	}
	if err := s.start(ctx, cfg); err != nil {
		s.abandon()
		return nil, err
	}
	return s, nil
}

func (s *Server) start(ctx context.Context, cfg Config) error {
	if cfg.DataDir == "" {
		removeStaleTempDirs(s.log)
		base, err := makeTempDir()
		if err != nil {
			return err
		}
		s.tempBase = base
		s.dataDir = filepath.Join(base, "data")
		if err := os.Mkdir(s.dataDir, 0o700); err != nil {
			return fmt.Errorf("pglocal: %w", err)
		}
		if err := s.account.own(s.dataDir); err != nil {
			return err
		}
	} else {
		abs, err := filepath.Abs(cfg.DataDir)
		if err != nil {
			return fmt.Errorf("pglocal: data directory %q: %w", cfg.DataDir, err)
		}
		s.dataDir = abs
		if reused, err := s.attach(ctx, cfg); reused || err != nil {
			return err
		}
		if err := s.prepareDataDir(); err != nil {
			return err
		}
	}

	if _, err := os.Stat(filepath.Join(s.dataDir, "PG_VERSION")); err == nil {
		if err := s.account.checkOwner(s.dataDir); err != nil {
			return err
		}
	} else if errors.Is(err, os.ErrNotExist) {
		if err := s.initdb(ctx, settingOff(cfg.Settings, "fsync")); err != nil {
			return err
		}
	} else {
		return fmt.Errorf("pglocal: %w", err)
	}

	if err := s.prepareSocketDir(); err != nil {
		return err
	}
	if err := s.openLog(); err != nil {
		return err
	}

	s.port = cfg.Port
	for attempt := 1; ; attempt++ {
		if cfg.Port == 0 {
			port, err := freePort()
			if err != nil {
				return err
			}
			s.port = port
		}
		err := s.launch(ctx, syscall.SIGINT)
		if err == nil {
			break
		}
		var inUse portInUseError
		if !errors.As(err, &inUse) {
			return err
		}
		if cfg.Port == 0 && attempt < portAttempts {
			s.log.Debug("port taken before postgres could bind it; trying another", "port", s.port)
			continue
		}
		return fmt.Errorf("pglocal: port %d on 127.0.0.1 is in use: choose another Config.Port, or 0 for a free one: %w", s.port, err)
	}
	return nil
}

// prepareDataDir makes a missing data directory and checks that the server
// user can reach it.
func (s *Server) prepareDataDir() error {
	fi, err := os.Stat(s.dataDir)
	switch {
	case errors.Is(err, os.ErrNotExist):
		if err := os.MkdirAll(filepath.Dir(s.dataDir), 0o755); err != nil {
			return fmt.Errorf("pglocal: %w", err)
		}
		if err := os.Mkdir(s.dataDir, 0o700); err != nil {
			return fmt.Errorf("pglocal: %w", err)
		}
		if err := s.account.own(s.dataDir); err != nil {
			return err
		}
	case err != nil:
		return fmt.Errorf("pglocal: %w", err)
	case !fi.IsDir():
		return fmt.Errorf("pglocal: data directory %s is a file: give a directory, or \"\" for a temporary one", s.dataDir)
	default:
		if _, err := os.Stat(filepath.Join(s.dataDir, "PG_VERSION")); errors.Is(err, os.ErrNotExist) {
			entries, err := os.ReadDir(s.dataDir)
			if err != nil {
				return fmt.Errorf("pglocal: %w", err)
			}
			if len(entries) > 0 {
				return fmt.Errorf("pglocal: data directory %s is not empty but holds no cluster (no PG_VERSION): give an empty or new directory, or \"\" for a temporary one", s.dataDir)
			}
			// An existing empty directory for initdb: hand it to the server user.
			if err := s.account.own(s.dataDir); err != nil {
				return err
			}
		}
	}
	return s.account.checkReachable(s.dataDir)
}

// attach looks for a server already running from the data directory and,
// when there is one that accepts connections, takes it as this Server
// without starting anything. reused is false when no server runs there.
func (s *Server) attach(ctx context.Context, cfg Config) (reused bool, err error) {
	pidPath := filepath.Join(s.dataDir, "postmaster.pid")
	lf, err := readLockFile(pidPath)
	if errors.Is(err, os.ErrNotExist) {
		return false, nil
	}
	if err != nil {
		return false, fmt.Errorf("pglocal: read %s: %w", pidPath, err)
	}
	if !processAlive(lf.pid) {
		return false, nil // stale: postgres replaces it when it starts
	}
	if name := processName(lf.pid); name != "" && name != "postgres" && name != "postmaster" {
		return false, fmt.Errorf("pglocal: %s names pid %d, but that process is %q, not postgres: if no server uses %s, remove the stale %s",
			pidPath, lf.pid, name, s.dataDir, pidPath)
	}
	if cfg.Port != 0 && lf.port != 0 && lf.port != cfg.Port {
		return false, fmt.Errorf("pglocal: a server (pid %d) already runs from %s on port %d, not on Config.Port %d: use port %d or 0, or stop that server",
			lf.pid, s.dataDir, lf.port, cfg.Port, lf.port)
	}
	if lf.status != "" && lf.listen == "" {
		return false, fmt.Errorf("pglocal: a server (pid %d) already runs from %s without TCP (listen_addresses is empty), and pglocal connects over 127.0.0.1: stop that server",
			lf.pid, s.dataDir)
	}
	// It may still be starting up: wait for it the way launch waits for ours.
	s.port, s.socketDir = lf.port, lf.socketDir
	ctx, cancel := context.WithTimeout(ctx, startTimeout)
	defer cancel()
	tick := time.NewTicker(50 * time.Millisecond)
	defer tick.Stop()
	for {
		err = s.ping(ctx)
		if err == nil {
			break
		}
		if !processAlive(lf.pid) {
			return false, fmt.Errorf("pglocal: the server (pid %d) running from %s exited while Start waited for it: %w", lf.pid, s.dataDir, err)
		}
		select {
		case <-ctx.Done():
			return false, fmt.Errorf("pglocal: a server (pid %d) runs from %s but did not accept connections on 127.0.0.1:%d within %s (%v): stop it, or wait until it is up",
				lf.pid, s.dataDir, lf.port, startTimeout, err)
		case <-tick.C:
		}
	}
	s.pid = lf.pid
	s.log.Info("postgres already running; using it", "data_dir", s.dataDir, "port", s.port, "pid", s.pid)
	if len(cfg.Settings) > 0 {
		s.log.Warn("settings not applied to a server that was already running", "data_dir", s.dataDir)
	}
	return true, nil
}

// initdb creates a new cluster in the (empty) data directory.
func (s *Server) initdb(ctx context.Context, noSync bool) error {
	args := []string{"-D", s.dataDir, "-U", "postgres", "--auth=trust", "-E", "UTF8", "--locale=C"}
	if noSync {
		args = append(args, "--no-sync")
	}
	cmd := exec.CommandContext(ctx, filepath.Join(s.binDir, "initdb"), args...)
	cmd.Dir = s.dataDir
	cmd.Env = s.env
	cmd.SysProcAttr = &syscall.SysProcAttr{Credential: s.account.credential()}
	began := time.Now()
	out, err := cmd.CombinedOutput()
	if err != nil {
		// The directory was empty: whatever is in it now is initdb's, and a
		// half-made cluster would look initialised to the next Start.
		s.emptyDataDir()
		return fmt.Errorf("pglocal: initdb %s: %w; its output ends with:\n%s", s.dataDir, err, lastLines(string(out), 20))
	}
	s.log.Info("initdb done", "data_dir", s.dataDir, "took", time.Since(began).Round(time.Millisecond))
	return nil
}

func (s *Server) emptyDataDir() {
	entries, _ := os.ReadDir(s.dataDir)
	for _, e := range entries {
		if err := os.RemoveAll(filepath.Join(s.dataDir, e.Name())); err != nil {
			s.log.Warn("remove what a failed initdb left", "path", filepath.Join(s.dataDir, e.Name()), "err", err)
		}
	}
}

// prepareSocketDir puts the socket in the data directory, or in a short
// temporary directory when the data directory's path is too long for a
// unix socket path.
func (s *Server) prepareSocketDir() error {
	if len(s.dataDir)+len(socketName) <= maxSocketPath {
		s.socketDir = s.dataDir
		return nil
	}
	dir, err := makeTempDir()
	if err != nil {
		return err
	}
	s.tempSocket = dir
	s.socketDir = dir
	if err := os.Chmod(dir, 0o700); err != nil {
		return fmt.Errorf("pglocal: %w", err)
	}
	return s.account.own(dir)
}

// openLog opens the server log, which postgres writes to as its stdout and
// stderr: beside the data directory for a temporary cluster, inside it
// otherwise. Restarts append to it.
func (s *Server) openLog() error {
	if s.tempBase != "" {
		s.logPath = filepath.Join(s.tempBase, "postgres.log")
	} else {
		s.logPath = filepath.Join(s.dataDir, "sidetrend-postgres.log")
	}
	f, err := os.OpenFile(s.logPath, os.O_WRONLY|os.O_CREATE|os.O_APPEND, 0o640)
	if err != nil {
		return fmt.Errorf("pglocal: open server log: %w", err)
	}
	s.logFile = f
	return s.account.own(s.logPath)
}

// portInUseError marks a start that failed because the port was taken.
type portInUseError struct{ error }

func (e portInUseError) Unwrap() error { return e.error }

// launch starts the postmaster and waits until it accepts connections. The
// caller holds s.mu or has not shared s yet.
func (s *Server) launch(ctx context.Context, orphanSignal syscall.Signal) error {
	logStart := int64(0)
	if fi, err := s.logFile.Stat(); err == nil {
		logStart = fi.Size()
	}
	args := []string{"-D", s.dataDir, "-p", strconv.Itoa(s.port),
		"-c", "listen_addresses=127.0.0.1",
		"-c", "unix_socket_directories=" + quoteListItem(s.socketDir),
		"-c", "max_connections=" + strconv.Itoa(DefaultMaxConnections),
	}
	for _, kv := range s.settings {
		args = append(args, "-c", kv)
	}
	began := time.Now()
	pm, err := startPostmaster(launchSpec{
		path:         filepath.Join(s.binDir, "postgres"),
		args:         args,
		dir:          s.dataDir,
		env:          s.env,
		log:          s.logFile,
		account:      s.account,
		orphanSignal: orphanSignal,
	})
	if err != nil {
		return err
	}
	if err := s.waitReady(ctx, pm, logStart); err != nil {
		if !pm.exited() {
			stopCtx, cancel := context.WithTimeout(context.WithoutCancel(ctx), killGrace)
			_ = pm.shutdown(stopCtx, syscall.SIGQUIT)
			cancel()
		}
		return err
	}
	s.pm, s.pid = pm, pm.pid
	s.log.Info("postgres accepting connections", "data_dir", s.dataDir, "port", s.port, "pid", pm.pid,
		"took", time.Since(began).Round(time.Millisecond))
	return nil
}

// waitReady polls with real connections until the server pm accepts them,
// pm exits, or the start timeout or ctx ends.
func (s *Server) waitReady(ctx context.Context, pm *postmaster, logStart int64) error {
	ctx, cancel := context.WithTimeout(ctx, startTimeout)
	defer cancel()
	tick := time.NewTicker(50 * time.Millisecond)
	defer tick.Stop()
	for {
		err := s.ping(ctx)
		if err == nil {
			return nil
		}
		select {
		case <-pm.done:
			tail := logTail(s.logPath, logStart)
			err := fmt.Errorf("pglocal: postgres exited during start (%v); server log %s ends with:\n%s", pm.err, s.logPath, tail)
			if strings.Contains(tail, "Address already in use") {
				return portInUseError{err}
			}
			return err
		case <-ctx.Done():
			return fmt.Errorf("pglocal: postgres (pid %d) did not accept connections on 127.0.0.1:%d (%v, last attempt: %v); server log %s ends with:\n%s",
				pm.pid, s.port, context.Cause(ctx), err, s.logPath, logTail(s.logPath, logStart))
		case <-tick.C:
		}
	}
}

// ping connects once and checks that the server on the port serves this
// data directory (and not some other server that holds the port).
func (s *Server) ping(ctx context.Context) error {
	cfg, err := pgx.ParseConfig(s.URL("postgres"))
	if err != nil {
		return err
	}
	cfg.ConnectTimeout = 2 * time.Second
	conn, err := pgx.ConnectConfig(ctx, cfg)
	if err != nil {
		return err
	}
	defer conn.Close(context.WithoutCancel(ctx))
	var dir string
	if err := conn.QueryRow(ctx, "SELECT current_setting('data_directory')").Scan(&dir); err != nil {
		return err
	}
	if !sameDir(dir, s.dataDir) {
		return fmt.Errorf("port %d is served by the cluster in %s, not %s", s.port, dir, s.dataDir)
	}
	return nil
}

func sameDir(a, b string) bool {
	if filepath.Clean(a) == filepath.Clean(b) {
		return true
	}
	fa, errA := os.Stat(a)
	fb, errB := os.Stat(b)
	return errA == nil && errB == nil && os.SameFile(fa, fb)
}

// URL is a connection URL for database dbname over TCP.
func (s *Server) URL(dbname string) string {
	return fmt.Sprintf("postgres://postgres@127.0.0.1:%d/%s?sslmode=disable", s.port, url.PathEscape(dbname))
}

// Port is the server's TCP port on 127.0.0.1.
func (s *Server) Port() int { return s.port }

// SocketDir is the directory holding the server's unix socket (use it as
// host for psql -h or a host= connection setting).
func (s *Server) SocketDir() string { return s.socketDir }

// DataDir is the absolute path of the cluster's data directory.
func (s *Server) DataDir() string { return s.dataDir }

// LogFile is the server log this package writes postgres's output to, ""
// for a server that was already running when Start found it.
func (s *Server) LogFile() string { return s.logPath }

// PID is the postmaster's process id; it changes on Restart.
func (s *Server) PID() int {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.pid
}

// Stop shuts the server down (fast shutdown: open transactions roll back,
// sessions end, a checkpoint is written), waits for it to exit, and removes
// the temporary directories Start made. When ctx ends first, Stop falls back
// to an immediate shutdown and returns an error. Stop is idempotent. It
// leaves a server alone that was already running when Start found it, or
// that was detached.
func (s *Server) Stop(ctx context.Context) error {
	s.mu.Lock()
	defer s.mu.Unlock()
	if s.stopped {
		return nil
	}
	s.stopped = true
	if s.detached {
		s.closeLog()
		return nil
	}
	var err error
	if s.pm != nil {
		err = s.pm.shutdown(ctx, syscall.SIGINT)
		s.log.Info("postgres stopped", "data_dir", s.dataDir, "pid", s.pm.pid)
	}
	s.closeLog()
	s.removeTemp()
	return err
}

// Restart stops the server and starts it again on the same port and data,
// returning once it accepts connections. mode "fast" shuts down cleanly;
// mode "immediate" stops at once without a checkpoint (what pg_ctl -m
// immediate does, by SIGQUIT), so the start runs crash recovery. Sessions
// open before the restart end; committed data stays.
func (s *Server) Restart(ctx context.Context, mode string) error {
	var sig syscall.Signal
	switch mode {
	case "fast":
		sig = syscall.SIGINT
	case "immediate":
		sig = syscall.SIGQUIT
	default:
		return fmt.Errorf("pglocal: restart mode %q: use \"fast\" or \"immediate\"", mode)
	}
	s.mu.Lock()
	defer s.mu.Unlock()
	switch {
	case s.stopped:
		return errors.New("pglocal: restart: the server was stopped; call Start for a new one")
	case s.detached:
		return errors.New("pglocal: restart: the server was detached and is no longer managed here")
	case s.pm == nil:
		return fmt.Errorf("pglocal: restart: the server in %s (pid %d) was already running when Start found it; only a server Start launched can be restarted", s.dataDir, s.pid)
	}
	if err := s.pm.shutdown(ctx, sig); err != nil {
		return fmt.Errorf("pglocal: restart: %w", err)
	}
	s.log.Info("postgres stopped for restart", "mode", mode, "pid", s.pm.pid)
	if err := s.launch(ctx, syscall.SIGINT); err != nil {
		return fmt.Errorf("pglocal: restart: %w", err)
	}
	return nil
}

// Detach lets the server outlive this process: Stop no longer stops it nor
// removes its directories (`demo --keep`). The postmaster was started with a
// parent-death signal, which would shut it down when this process exits,
// and only the process itself can clear that; so Detach restarts it (fast,
// same port and data, new pid) without one. Sessions open at that moment
// end. Detach does nothing to a server that was already running when Start
// found it. Failures are logged: the server may then be down.
func (s *Server) Detach() {
	s.mu.Lock()
	defer s.mu.Unlock()
	if s.detached || s.stopped {
		return
	}
	s.detached = true
	disown(s.tempBase)
	disown(s.tempSocket)
	if s.pm == nil {
		return
	}
	ctx, cancel := context.WithTimeout(context.Background(), startTimeout+killGrace)
	defer cancel()
	if err := s.pm.shutdown(ctx, syscall.SIGINT); err != nil {
		s.log.Error("detach: stop postgres for its restart", "pid", s.pm.pid, "err", err)
	}
	if err := s.launch(ctx, 0); err != nil {
		s.log.Error("detach: restart postgres without a parent-death signal", "data_dir", s.dataDir, "err", err)
		return
	}
	s.log.Info("postgres detached; it keeps running after this process exits",
		"data_dir", s.dataDir, "port", s.port, "pid", s.pid, "log", s.logPath)
}

// abandon undoes a Start that failed part-way.
func (s *Server) abandon() {
	if s.pm != nil && !s.pm.exited() {
		ctx, cancel := context.WithTimeout(context.Background(), killGrace)
		_ = s.pm.shutdown(ctx, syscall.SIGQUIT)
		cancel()
	}
	s.closeLog()
	s.removeTemp()
}

func (s *Server) closeLog() {
	if s.logFile != nil {
		s.logFile.Close()
		s.logFile = nil
	}
}

func (s *Server) removeTemp() {
	for _, dir := range []string{s.tempSocket, s.tempBase} {
		if dir == "" {
			continue
		}
		if err := os.RemoveAll(dir); err != nil {
			s.log.Warn("remove temporary directory", "dir", dir, "err", err)
		}
	}
}

// serverSettings checks Config.Settings and returns them as name=value
// arguments, sorted by name so that the command line is reproducible.
func serverSettings(m map[string]string) ([]string, error) {
	names := make([]string, 0, len(m))
	for name := range m {
		if !settingName.MatchString(name) {
			return nil, fmt.Errorf("pglocal: setting %q is not a Postgres setting name: use names like shared_buffers", name)
		}
		if why, ok := reservedSettings[strings.ToLower(name)]; ok {
			return nil, fmt.Errorf("pglocal: setting %q is managed by pglocal: %s", name, why)
		}
		if strings.ContainsRune(m[name], 0) {
			return nil, fmt.Errorf("pglocal: setting %q has a NUL byte in its value", name)
		}
		names = append(names, name)
	}
	slices.Sort(names)
	out := make([]string, len(names))
	for i, name := range names {
		out[i] = name + "=" + m[name]
	}
	return out, nil
}

// settingOff reports whether m turns the boolean setting name off, in any
// of the usual spellings (off, false, no, 0).
func settingOff(m map[string]string, name string) bool {
	for k, v := range m {
		if strings.EqualFold(k, name) {
			switch strings.ToLower(strings.TrimSpace(v)) {
			case "off", "false", "no", "0":
				return true
			}
		}
	}
	return false
}

// quoteListItem quotes a directory for a Postgres list setting such as
// unix_socket_directories, so that commas and spaces in it survive.
func quoteListItem(dir string) string {
	return `"` + strings.ReplaceAll(dir, `"`, `""`) + `"`
}

// childEnv is this process's environment without PG* variables, which
// would otherwise steer initdb and postgres (PGDATA, PGPORT, ...).
func childEnv() []string {
	var env []string
	for _, kv := range os.Environ() {
		if !strings.HasPrefix(kv, "PG") {
			env = append(env, kv)
		}
	}
	return env
}

// freePort asks the kernel for a free TCP port on 127.0.0.1. Another
// process may take it before postgres binds it; Start then tries again.
func freePort() (int, error) {
	l, err := net.Listen("tcp4", "127.0.0.1:0")
	if err != nil {
		return 0, fmt.Errorf("pglocal: find a free port on 127.0.0.1: %w", err)
	}
	defer l.Close()
	return l.Addr().(*net.TCPAddr).Port, nil
}

// logTail returns the last lines of the server log written since offset.
func logTail(path string, offset int64) string {
	f, err := os.Open(path)
	if err != nil {
		return "  (no server log: " + err.Error() + ")"
	}
	defer f.Close()
	const maxBytes = 16 << 10
	if fi, err := f.Stat(); err == nil && fi.Size()-offset > maxBytes {
		offset = fi.Size() - maxBytes
	}
	if _, err := f.Seek(offset, io.SeekStart); err != nil {
		return "  (server log unreadable: " + err.Error() + ")"
	}
	b, _ := io.ReadAll(f)
	if len(b) == 0 {
		return "  (server log is empty)"
	}
	return lastLines(string(b), 30)
}

// lastLines returns the last n lines of text, indented.
func lastLines(text string, n int) string {
	lines := strings.Split(strings.TrimRight(text, "\n"), "\n")
	if len(lines) > n {
		lines = lines[len(lines)-n:]
	}
	return "  | " + strings.Join(lines, "\n  | ")
}
