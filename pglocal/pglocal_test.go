package pglocal

import (
	"context"
	"errors"
	"fmt"
	"log/slog"
	"os"
	"os/exec"
	"path/filepath"
	"runtime"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"
)

// testSettings make initdb and the server skip fsync: these clusters are
// thrown away, and initdb takes about 1.3 s instead of 2.1 s here.
var testSettings = map[string]string{"fsync": "off"}

func TestFindBinDirMissing(t *testing.T) {
	t.Parallel()
	_, err := findBinDir("", t.TempDir())
	if err == nil {
		t.Fatal("findBinDir with an empty PATH and no version directories: want an error")
	}
	for _, want := range []string{"make postgres", "apt-get install", "postgresql"} {
		if !strings.Contains(err.Error(), want) {
			t.Errorf("error %q does not say %q", err, want)
		}
	}
}

func TestFindBinDirOrder(t *testing.T) {
	t.Parallel()
	fakeBin := func(dir string, names ...string) {
		t.Helper()
		if err := os.MkdirAll(dir, 0o755); err != nil {
			t.Fatal(err)
		}
		for _, name := range names {
			if err := os.WriteFile(filepath.Join(dir, name), []byte("#!/bin/sh\n"), 0o755); err != nil {
				t.Fatal(err)
			}
		}
	}
	lib := t.TempDir()
	fakeBin(filepath.Join(lib, "9.6", "bin"), "initdb", "postgres")
	fakeBin(filepath.Join(lib, "14", "bin"), "initdb", "postgres")
	fakeBin(filepath.Join(lib, "15", "bin"), "initdb", "postgres")
	fakeBin(filepath.Join(lib, "16", "bin"), "initdb") // incomplete: no postgres
	fakeBin(filepath.Join(lib, "tools"), "initdb", "postgres")

	got, err := findBinDir("", lib)
	if want := filepath.Join(lib, "15", "bin"); err != nil || got != want {
		t.Errorf("newest complete version: got %q, %v; want %q (16 lacks postgres, 9.6 < 14 < 15)", got, err, want)
	}

	onPath := t.TempDir()
	fakeBin(onPath, "initdb", "postgres")
	got, err = findBinDir(t.TempDir()+string(os.PathListSeparator)+onPath, lib)
	if err != nil || got != onPath {
		t.Errorf("PATH first: got %q, %v; want %q", got, err, onPath)
	}

	// Symbolic links on PATH resolve to the directory they point into, as
	// /usr/local/bin/initdb -> /usr/lib/postgresql/15/bin/initdb does here.
	links := t.TempDir()
	for _, name := range []string{"initdb", "postgres"} {
		if err := os.Symlink(filepath.Join(lib, "14", "bin", name), filepath.Join(links, name)); err != nil {
			t.Fatal(err)
		}
	}
	got, err = findBinDir(links, lib)
	if want := filepath.Join(lib, "14", "bin"); err != nil || got != want {
		t.Errorf("symlinked PATH entry: got %q, %v; want %q", got, err, want)
	}
}

func TestStartRejectsBadConfig(t *testing.T) {
	t.Parallel()
	for _, tc := range []struct {
		cfg  Config
		want string
	}{
		{Config{Settings: map[string]string{"port": "5432"}}, "Config.Port"},
		{Config{Settings: map[string]string{"listen_addresses": "*"}}, "127.0.0.1"},
		{Config{Settings: map[string]string{"shared buffers": "1MB"}}, "not a Postgres setting name"},
		{Config{Port: -1}, "not a TCP port"},
		{Config{Port: 70000}, "not a TCP port"},
	} {
		s, err := Start(t.Context(), tc.cfg)
		if err == nil {
			s.Stop(t.Context())
			t.Errorf("Start(%+v): want an error", tc.cfg)
			continue
		}
		if !strings.Contains(err.Error(), tc.want) {
			t.Errorf("Start(%+v): error %q does not say %q", tc.cfg, err, tc.want)
		}
	}
}

func TestStartRejectsNonEmptyDir(t *testing.T) {
	t.Parallel()
	dir := reachableTempDir(t)
	if err := os.WriteFile(filepath.Join(dir, "notes.txt"), []byte("mine\n"), 0o644); err != nil {
		t.Fatal(err)
	}
	_, err := Start(t.Context(), Config{DataDir: dir})
	if err == nil || !strings.Contains(err.Error(), "not empty") {
		t.Fatalf("Start on a directory holding a file but no cluster: got %v, want an error saying it is not empty", err)
	}
	if b, err := os.ReadFile(filepath.Join(dir, "notes.txt")); err != nil || string(b) != "mine\n" {
		t.Errorf("the file in the directory was touched: %q, %v", b, err)
	}
}

func TestStartFailureShowsLog(t *testing.T) {
	t.Parallel()
	_, err := Start(t.Context(), Config{Settings: map[string]string{"fsync": "off", "shared_buffers": "lots"}})
	if err == nil {
		t.Fatal("Start with shared_buffers=lots: want an error")
	}
	// The server's own complaint, from the log tail in the error.
	if !strings.Contains(err.Error(), `invalid value for parameter "shared_buffers"`) {
		t.Errorf("error does not carry the server log's reason:\n%v", err)
	}
	// The temporary cluster is gone: the log path in the message was in it.
	_, rest, ok := strings.Cut(err.Error(), "server log ")
	if !ok {
		t.Fatalf("error names no server log:\n%v", err)
	}
	logPath, _, _ := strings.Cut(rest, " ")
	if _, statErr := os.Stat(filepath.Dir(logPath)); !errors.Is(statErr, os.ErrNotExist) {
		t.Errorf("temporary directory %s left behind after a failed Start (%v)", filepath.Dir(logPath), statErr)
	}
}

func TestLifecycle(t *testing.T) {
	t.Parallel()
	ctx := t.Context()

	// Start from a goroutine locked to an OS thread that then ends: the
	// parent-death signal must not follow that thread (see startPostmaster).
	// The runtime never ends the main thread, and a new goroutine tends to
	// run on the thread of the one that made it; so an outer goroutine holds
	// its thread (often the main one) while the inner one, which cannot run
	// there, calls Start.
	type started struct {
		s     *Server
		err   error
		tid   int
		again bool
	}
	var st started
	for attempt := 0; attempt < 100; attempt++ {
		outer := make(chan started, 1)
		go func() {
			runtime.LockOSThread()
			defer runtime.UnlockOSThread()
			inner := make(chan started, 1)
			go func() {
				runtime.LockOSThread()
				tid := syscall.Gettid()
				if tid == os.Getpid() {
					runtime.UnlockOSThread()
					inner <- started{again: true}
					return
				}
				s, err := Start(ctx, Config{Settings: testSettings})
				inner <- started{s, err, tid, false}
				// Returning while locked ends this OS thread.
			}()
			outer <- <-inner
		}()
		if st = <-outer; !st.again {
			break
		}
	}
	if st.again {
		t.Fatal("100 goroutines in a row ran on the main thread")
	}
	if st.err != nil {
		t.Fatal(st.err)
	}
	s := st.s
	t.Cleanup(func() { s.Stop(context.WithoutCancel(ctx)) })
	waitFor(t, "the thread that called Start to end", func() bool {
		_, err := os.Stat(fmt.Sprintf("/proc/self/task/%d", st.tid))
		return errors.Is(err, os.ErrNotExist)
	})
	// Had the signal followed that thread, the postmaster would now be in a
	// fast shutdown and refuse the connections below.

	if !processAlive(s.PID()) {
		t.Fatalf("postmaster %d is not running after the starting thread ended", s.PID())
	}
	if got, want := s.URL("db x"), fmt.Sprintf("postgres://postgres@127.0.0.1:%d/db%%20x?sslmode=disable", s.Port()); got != want {
		t.Errorf("URL: got %q, want %q", got, want)
	}
	if os.Geteuid() == 0 {
		acct, err := lookupAccount(ServerUser)
		if err != nil {
			t.Fatal(err)
		}
		if uid := processUID(t, s.PID()); uid != acct.uid {
			t.Errorf("running as root, the postmaster runs as uid %d; want %s (uid %d)", uid, ServerUser, acct.uid)
		}
	}

	conn := connect(t, s.URL("postgres"))
	for setting, want := range map[string]string{
		"listen_addresses": "127.0.0.1",
		"max_connections":  strconv.Itoa(DefaultMaxConnections),
		"fsync":            "off",
		"port":             strconv.Itoa(s.Port()),
		"server_encoding":  "UTF8",
		"lc_collate":       "C",
	} {
		var got string
		if err := conn.QueryRow(ctx, "SELECT current_setting($1)", setting).Scan(&got); err != nil {
			t.Fatal(err)
		}
		if got != want {
			t.Errorf("%s = %q, want %q", setting, got, want)
		}
	}
	mustExec(t, conn, "CREATE TABLE kept (n int)", "INSERT INTO kept VALUES (1)")

	// The unix socket works too.
	sock := connect(t, fmt.Sprintf("host='%s' port=%d user=postgres dbname=postgres", s.SocketDir(), s.Port()))
	sock.Close(ctx)

	pid := s.PID()
	if err := s.Restart(ctx, "fast"); err != nil {
		t.Fatal(err)
	}
	if s.PID() == pid {
		t.Errorf("PID %d unchanged after a restart", pid)
	}
	if _, err := conn.Exec(ctx, "SELECT 1"); err == nil {
		t.Error("a session from before the restart still works; want it ended")
	}
	conn = connect(t, s.URL("postgres"))
	mustExec(t, conn, "INSERT INTO kept VALUES (2)")
	conn.Close(ctx)

	if err := s.Restart(ctx, "immediate"); err != nil {
		t.Fatal(err)
	}
	conn = connect(t, s.URL("postgres"))
	var n, sum int
	if err := conn.QueryRow(ctx, "SELECT count(*), sum(n) FROM kept").Scan(&n, &sum); err != nil {
		t.Fatal(err)
	}
	if n != 2 || sum != 3 {
		t.Errorf("after fast and immediate restarts: %d rows summing to %d; want the 2 committed rows, 1 + 2 = 3", n, sum)
	}
	conn.Close(ctx)
	// An immediate shutdown skips the checkpoint, so the start ran crash
	// recovery; Postgres says so in its log with this message.
	if b, err := os.ReadFile(s.LogFile()); err != nil {
		t.Fatal(err)
	} else if !strings.Contains(string(b), "automatic recovery in progress") {
		t.Errorf("no crash recovery in the server log after an immediate restart:\n%s", b)
	}

	if err := s.Restart(ctx, "smart"); err == nil || !strings.Contains(err.Error(), `"immediate"`) {
		t.Errorf("Restart(smart): got %v, want an error naming the modes", err)
	}

	pid, dir := s.PID(), s.DataDir()
	if err := s.Stop(ctx); err != nil {
		t.Fatal(err)
	}
	if err := s.Stop(ctx); err != nil {
		t.Errorf("second Stop: %v; want nil", err)
	}
	if processAlive(pid) {
		t.Errorf("postmaster %d still running after Stop", pid)
	}
	if _, err := os.Stat(dir); !errors.Is(err, os.ErrNotExist) {
		t.Errorf("temporary data directory %s still there after Stop (%v)", dir, err)
	}
	if err := s.Restart(ctx, "fast"); err == nil {
		t.Error("Restart after Stop: want an error")
	}
}

func TestReuse(t *testing.T) {
	t.Parallel()
	ctx := t.Context()
	// A long path with a space: the socket cannot live in it (Linux allows
	// 107 bytes for a socket path), and the space must survive quoting.
	dataDir := filepath.Join(reachableTempDir(t), "a data directory", strings.Repeat("x", 80))
	port, err := freePort()
	if err != nil {
		t.Fatal(err)
	}
	// No fsync setting here, so that initdb's normal (syncing) path runs.
	s1, err := Start(ctx, Config{DataDir: dataDir, Port: port})
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { s1.Stop(context.WithoutCancel(ctx)) })
	if s1.Port() != port {
		t.Errorf("Port() = %d, want the configured %d", s1.Port(), port)
	}
	if s1.DataDir() != dataDir {
		t.Errorf("DataDir() = %q, want %q", s1.DataDir(), dataDir)
	}
	if s1.SocketDir() == dataDir || len(s1.SocketDir()+socketName) > maxSocketPath {
		t.Errorf("SocketDir() = %q for a %d-byte data directory; want a short directory elsewhere", s1.SocketDir(), len(dataDir))
	}
	sock := connect(t, fmt.Sprintf("host='%s' port=%d user=postgres dbname=postgres", s1.SocketDir(), port))
	mustExec(t, sock, "CREATE TABLE kept (n int)", "INSERT INTO kept VALUES (42)")
	sock.Close(ctx)

	// A second Start on the running cluster uses it.
	s2, err := Start(ctx, Config{DataDir: dataDir})
	if err != nil {
		t.Fatal(err)
	}
	if s2.PID() != s1.PID() || s2.Port() != s1.Port() || s2.SocketDir() != s1.SocketDir() {
		t.Errorf("reused server: pid %d port %d socket %q; want pid %d port %d socket %q",
			s2.PID(), s2.Port(), s2.SocketDir(), s1.PID(), s1.Port(), s1.SocketDir())
	}
	if err := s2.Restart(ctx, "fast"); err == nil {
		t.Error("Restart of a server Start did not launch: want an error")
	}
	if err := s2.Stop(ctx); err != nil {
		t.Fatal(err)
	}
	conn := connect(t, s1.URL("postgres")) // still up: s2 did not start it
	conn.Close(ctx)
	if _, err := Start(ctx, Config{DataDir: dataDir, Port: port + 1}); err == nil || !strings.Contains(err.Error(), "Config.Port") {
		t.Errorf("Start on the running cluster with another port: got %v, want an error about Config.Port", err)
	}

	sockDir := s1.SocketDir()
	if err := s1.Stop(ctx); err != nil {
		t.Fatal(err)
	}
	if _, err := os.Stat(filepath.Join(dataDir, "PG_VERSION")); err != nil {
		t.Errorf("Stop removed a data directory it was given: %v", err)
	}
	if _, err := os.Stat(sockDir); !errors.Is(err, os.ErrNotExist) {
		t.Errorf("temporary socket directory %s still there after Stop (%v)", sockDir, err)
	}

	// An initialised, stopped cluster starts with its data.
	s3, err := Start(ctx, Config{DataDir: dataDir, Settings: testSettings})
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { s3.Stop(context.WithoutCancel(ctx)) })
	conn = connect(t, s3.URL("postgres"))
	var n int
	if err := conn.QueryRow(ctx, "SELECT n FROM kept").Scan(&n); err != nil || n != 42 {
		t.Errorf("data from before the stop: got %d, %v; want the 42 inserted above", n, err)
	}
	conn.Close(ctx)
	if err := s3.Stop(ctx); err != nil {
		t.Fatal(err)
	}
}

func connect(t *testing.T, connString string) *pgx.Conn {
	t.Helper()
	conn, err := pgx.Connect(t.Context(), connString)
	if err != nil {
		t.Fatalf("connect %s: %v", connString, err)
	}
	t.Cleanup(func() { conn.Close(context.Background()) })
	return conn
}

func mustExec(t *testing.T, conn *pgx.Conn, sqls ...string) {
	t.Helper()
	for _, sql := range sqls {
		if _, err := conn.Exec(t.Context(), sql); err != nil {
			t.Fatalf("%s: %v", sql, err)
		}
	}
}

// waitFor polls cond until it holds, failing the test after 30 s.
func waitFor(t *testing.T, what string, cond func() bool) {
	t.Helper()
	deadline := time.NewTimer(30 * time.Second)
	defer deadline.Stop()
	tick := time.NewTicker(20 * time.Millisecond)
	defer tick.Stop()
	for !cond() {
		select {
		case <-deadline.C:
			t.Fatalf("gave up after 30 s waiting for %s", what)
		case <-tick.C:
		}
	}
}

// reachableTempDir is a t.TempDir that the unprivileged server user can
// pass through: testing makes its directories 0700.
func reachableTempDir(t *testing.T) string {
	t.Helper()
	dir := t.TempDir()
	for _, d := range []string{dir, filepath.Dir(dir)} {
		if err := os.Chmod(d, 0o755); err != nil {
			t.Fatal(err)
		}
	}
	return dir
}

func processUID(t *testing.T, pid int) uint32 {
	t.Helper()
	fi, err := os.Stat(fmt.Sprintf("/proc/%d", pid))
	if err != nil {
		t.Fatal(err)
	}
	return fi.Sys().(*syscall.Stat_t).Uid
}

// The tests below run this test binary again as a helper process that
// starts a server and exits, to see what happens to the server when its
// parent is gone. helperEnv selects what the helper does.
const (
	helperEnv    = "SIDETREND_PGLOCAL_HELPER"
	helperDirEnv = "SIDETREND_PGLOCAL_HELPER_DIR"
	helperMark   = "pglocal-helper:"
)

// TestHelperProcess is the helper; it does nothing in a normal test run.
func TestHelperProcess(t *testing.T) {
	mode := os.Getenv(helperEnv)
	if mode == "" {
		return
	}
	ctx := context.Background()
	s, err := Start(ctx, Config{DataDir: os.Getenv(helperDirEnv), Settings: testSettings})
	if err != nil {
		fmt.Fprintln(os.Stderr, err)
		os.Exit(3)
	}
	switch mode {
	case "detach":
		s.Detach()
	case "query":
		conn, err := pgx.Connect(ctx, s.URL("postgres"))
		if err != nil {
			fmt.Fprintln(os.Stderr, err)
			os.Exit(4)
		}
		var one int
		if err := conn.QueryRow(ctx, "SELECT 1").Scan(&one); err != nil || one != 1 {
			fmt.Fprintln(os.Stderr, "SELECT 1:", one, err)
			os.Exit(5)
		}
		conn.Close(ctx)
		if err := s.Stop(ctx); err != nil {
			fmt.Fprintln(os.Stderr, err)
			os.Exit(6)
		}
	}
	fmt.Printf("%s %d %d %d %s\n", helperMark, os.Geteuid(), s.PID(), s.Port(), s.DataDir())
	// "orphan" and "detach" exit with the server running and not stopped.
	os.Exit(0)
}

// becomeSubreaper makes this test process the parent of the servers its
// helpers leave behind (PR_SET_CHILD_SUBREAPER), so that reap can collect
// them: where init does not reap orphans, they would stay zombies.
func becomeSubreaper(t *testing.T) {
	subreaperOnce.Do(func() {
		const prSetChildSubreaper = 36 // PR_SET_CHILD_SUBREAPER, <linux/prctl.h>
		if _, _, errno := syscall.RawSyscall(syscall.SYS_PRCTL, prSetChildSubreaper, 1, 0); errno != 0 {
			t.Logf("cannot become a child subreaper (%v); orphaned servers are left to init", errno)
		}
	})
}

var subreaperOnce sync.Once

// reap waits for pid, a server a helper left behind, to exit and collects
// it. It does nothing when pid was not handed to this process.
func reap(t *testing.T, pid int) {
	t.Helper()
	done := make(chan error, 1)
	go func() {
		var ws syscall.WaitStatus
		_, err := syscall.Wait4(pid, &ws, 0, nil)
		done <- err
	}()
	deadline := time.NewTimer(30 * time.Second)
	defer deadline.Stop()
	select {
	case err := <-done:
		if err != nil && !errors.Is(err, syscall.ECHILD) {
			t.Errorf("reap postmaster %d: %v", pid, err)
		}
	case <-deadline.C:
		t.Errorf("postmaster %d did not exit within 30 s", pid)
	}
}

type helperResult struct {
	euid, pid, port int
	dataDir         string
}

// runHelper runs TestHelperProcess in mode as a separate process, as the
// user cred names (nil: as this one), and returns what it printed.
func runHelper(t *testing.T, binary, mode, dataDir string, cred *syscall.Credential) helperResult {
	t.Helper()
	becomeSubreaper(t)
	cmd := exec.CommandContext(t.Context(), binary, "-test.run=^TestHelperProcess$", "-test.count=1")
	cmd.Env = append(os.Environ(), helperEnv+"="+mode, helperDirEnv+"="+dataDir)
	if cred != nil {
		cmd.SysProcAttr = &syscall.SysProcAttr{Credential: cred}
		cmd.Dir = "/"
		cmd.Env = append(cmd.Env, "HOME=/", "TMPDIR=")
	}
	var stderr strings.Builder
	cmd.Stderr = &stderr
	out, err := cmd.Output()
	if err != nil {
		t.Fatalf("helper %s: %v\nstdout:\n%s\nstderr:\n%s", mode, err, out, stderr.String())
	}
	for line := range strings.Lines(string(out)) {
		rest, ok := strings.CutPrefix(line, helperMark+" ")
		if !ok {
			continue
		}
		var r helperResult
		if _, err := fmt.Sscanf(rest, "%d %d %d", &r.euid, &r.pid, &r.port); err != nil {
			t.Fatalf("helper %s printed %q: %v", mode, line, err)
		}
		fields := strings.SplitN(strings.TrimSpace(rest), " ", 4)
		r.dataDir = fields[len(fields)-1]
		return r
	}
	t.Fatalf("helper %s printed no result:\n%s\nstderr:\n%s", mode, out, stderr.String())
	return helperResult{}
}

// TestOrphanedServerStops: a process that exits (or is killed) without
// calling Stop takes its server with it, through the parent-death signal,
// and the next Start removes the temporary directory it left.
func TestOrphanedServerStops(t *testing.T) {
	t.Parallel()
	r := runHelper(t, os.Args[0], "orphan", "", nil)
	base := filepath.Dir(r.dataDir)
	if !strings.HasPrefix(filepath.Base(base), tempPrefix) {
		t.Fatalf("helper's data directory %s is not in a temporary directory of ours", r.dataDir)
	}
	t.Cleanup(func() { os.RemoveAll(base) })
	// The postmaster removes postmaster.pid as the last step of a shutdown.
	// (Its pid may linger as a zombie if nothing reaps orphans here.)
	pidFile := filepath.Join(r.dataDir, "postmaster.pid")
	waitFor(t, fmt.Sprintf("the orphaned postmaster %d to shut down", r.pid), func() bool {
		_, err := os.Stat(pidFile)
		return errors.Is(err, os.ErrNotExist)
	})
	reap(t, r.pid)
	removeStaleTempDirs(slog.New(slog.DiscardHandler))
	if _, err := os.Stat(base); !errors.Is(err, os.ErrNotExist) {
		t.Errorf("stale temporary directory %s of the dead helper survived removeStaleTempDirs (%v)", base, err)
	}
}

// TestDetachOutlivesProcess: a detached server keeps running after the
// process that started it exits.
func TestDetachOutlivesProcess(t *testing.T) {
	t.Parallel()
	ctx := t.Context()
	dataDir := filepath.Join(reachableTempDir(t), "data")
	r := runHelper(t, os.Args[0], "detach", dataDir, nil)
	pidFile := filepath.Join(dataDir, "postmaster.pid")
	gone := func() bool {
		_, err := os.Stat(pidFile)
		return errors.Is(err, os.ErrNotExist)
	}
	// This test started that server (through the helper): stop it by the
	// pid the helper reported, once that is still the pid in charge.
	stop := func() {
		lf, err := readLockFile(pidFile)
		if err != nil || lf.pid != r.pid {
			return
		}
		if err := syscall.Kill(r.pid, syscall.SIGINT); err != nil {
			t.Errorf("stop detached postmaster %d: %v", r.pid, err)
			return
		}
		waitFor(t, fmt.Sprintf("detached postmaster %d to stop", r.pid), gone)
		reap(t, r.pid)
	}
	t.Cleanup(stop)

	conn := connect(t, fmt.Sprintf("postgres://postgres@127.0.0.1:%d/postgres?sslmode=disable", r.port))
	var pid int
	if err := conn.QueryRow(ctx, "SELECT pg_backend_pid()").Scan(&pid); err != nil {
		t.Fatalf("detached server after its parent exited: %v", err)
	}
	conn.Close(ctx)
	if lf, err := readLockFile(pidFile); err != nil || lf.pid != r.pid {
		t.Fatalf("postmaster.pid: %+v, %v; want pid %d as the helper reported", lf, err, r.pid)
	}
	// The dir is the caller's: a later Start uses the running server as is.
	s, err := Start(ctx, Config{DataDir: dataDir})
	if err != nil {
		t.Fatal(err)
	}
	if s.PID() != r.pid {
		t.Errorf("Start on the detached cluster: pid %d, want %d", s.PID(), r.pid)
	}
	s.Stop(ctx)
	stop()
}

// TestNonRoot runs a server as an ordinary user; the rest of the tests run
// as whoever runs them, which here is root (the server then runs as
// ServerUser).
func TestNonRoot(t *testing.T) {
	t.Parallel()
	if os.Geteuid() != 0 {
		t.Skip("needs root to switch to another user; as a non-root user every other test already covers this path")
	}
	nobody, err := lookupAccount("nobody")
	if err != nil {
		t.Skipf("no OS user nobody to run as: %v", err)
	}
	// The test binary sits in a 0700 build directory; give nobody a copy.
	binary := filepath.Join(reachableTempDir(t), "pglocal.test")
	b, err := os.ReadFile(os.Args[0])
	if err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(binary, b, 0o755); err != nil {
		t.Fatal(err)
	}
	r := runHelper(t, binary, "query", "", nobody.credential())
	if r.euid != int(nobody.uid) {
		t.Errorf("helper ran as uid %d, want nobody (%d)", r.euid, nobody.uid)
	}
	if _, err := os.Stat(r.dataDir); !errors.Is(err, os.ErrNotExist) {
		t.Errorf("temporary data directory %s left after Stop (%v)", r.dataDir, err)
	}
}
