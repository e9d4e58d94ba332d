package pglocal

import (
	"bufio"
	"errors"
	"fmt"
	"log/slog"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"syscall"
)

// tempPrefix names the temporary directories Start makes: a base holding a
// new cluster (DataDir ""), or a short socket directory.
const tempPrefix = "sidetrend-pg-"

// ownerFile, inside a temporary directory, holds the pid of the process
// that made it. A directory whose owner and server are both gone was left
// by a killed process; the next Start removes it.
const ownerFile = ".sidetrend-owner"

// maxSocketPath is the longest unix socket path Linux accepts: sun_path is
// 108 bytes including the terminating NUL.
const maxSocketPath = 107

// socketName is the longest name Postgres gives its socket in the socket
// directory (".s.PGSQL." and a five-digit port).
const socketName = "/.s.PGSQL.65535"

// tempRoot is where temporary directories go: the system's, unless that
// path is so long that a socket inside it would not fit.
func tempRoot() string {
	dir := os.TempDir()
	if len(dir)+len("/"+tempPrefix+"1234567890"+socketName) > maxSocketPath {
		return "/tmp"
	}
	return dir
}

// makeTempDir makes a new temporary directory, mode 0755 so that the server
// user can pass through it, marked with this process as its owner.
func makeTempDir() (string, error) {
	dir, err := os.MkdirTemp(tempRoot(), tempPrefix)
	if err != nil {
		return "", fmt.Errorf("pglocal: make a temporary directory: %w", err)
	}
	if err := os.WriteFile(filepath.Join(dir, ownerFile), []byte(strconv.Itoa(os.Getpid())+"\n"), 0o644); err != nil {
		os.RemoveAll(dir)
		return "", fmt.Errorf("pglocal: mark temporary directory: %w", err)
	}
	if err := os.Chmod(dir, 0o755); err != nil {
		os.RemoveAll(dir)
		return "", fmt.Errorf("pglocal: make %s traversable: %w", dir, err)
	}
	return dir, nil
}

// disown removes the owner mark, so that removeStaleTempDirs never takes dir.
func disown(dir string) {
	if dir != "" {
		os.Remove(filepath.Join(dir, ownerFile))
	}
}

// removeStaleTempDirs removes temporary directories left by processes that
// were killed before Stop ran: the owner is gone and no server still runs
// from the directory. Directories it cannot judge or remove are left alone.
func removeStaleTempDirs(log *slog.Logger) {
	root := tempRoot()
	matches, _ := filepath.Glob(filepath.Join(root, tempPrefix+"*"))
	for _, dir := range matches {
		b, err := os.ReadFile(filepath.Join(dir, ownerFile))
		if err != nil {
			continue // no mark: being made right now, detached, or not ours
		}
		owner, err := strconv.Atoi(strings.TrimSpace(string(b)))
		if err != nil || owner == os.Getpid() || processAlive(owner) {
			continue
		}
		if serverRunsFrom(dir) {
			continue
		}
		if err := os.RemoveAll(dir); err != nil {
			log.Debug("leave stale temporary directory", "dir", dir, "err", err)
			continue
		}
		log.Debug("removed stale temporary directory", "dir", dir, "owner_pid", owner)
	}
}

// serverRunsFrom reports whether a live postmaster uses dir, as its data
// directory (dir/data/postmaster.pid) or its socket directory (socket lock
// files hold the postmaster's pid on their first line too).
func serverRunsFrom(dir string) bool {
	locks, _ := filepath.Glob(filepath.Join(dir, ".s.PGSQL.*.lock"))
	locks = append(locks, filepath.Join(dir, "data", "postmaster.pid"))
	for _, path := range locks {
		pf, err := readLockFile(path)
		if err != nil {
			if errors.Is(err, os.ErrNotExist) {
				continue
			}
			return true // cannot tell: leave it
		}
		if processAlive(pf.pid) {
			return true
		}
	}
	return false
}

// lockFile is what Postgres writes to postmaster.pid: pid, data directory,
// start time, port, first socket directory, first listen address, shared
// memory key and status, one a line (see pidfile.h).
type lockFile struct {
	pid       int
	dataDir   string
	port      int
	socketDir string
	listen    string
	status    string
}

func readLockFile(path string) (lockFile, error) {
	f, err := os.Open(path)
	if err != nil {
		return lockFile{}, err
	}
	defer f.Close()
	var lines []string
	sc := bufio.NewScanner(f)
	for sc.Scan() {
		lines = append(lines, sc.Text())
	}
	if err := sc.Err(); err != nil {
		return lockFile{}, err
	}
	line := func(i int) string {
		if i < len(lines) {
			return strings.TrimSpace(lines[i])
		}
		return ""
	}
	pid, err := strconv.Atoi(line(0))
	if err != nil || pid <= 0 {
		return lockFile{}, fmt.Errorf("%s: first line %q is not a pid", path, line(0))
	}
	port, _ := strconv.Atoi(line(3))
	return lockFile{
		pid:       pid,
		dataDir:   line(1),
		port:      port,
		socketDir: line(4),
		listen:    line(5),
		status:    line(7),
	}, nil
}

// processAlive reports whether pid names a process that has not exited. A
// zombie (exited, not yet reaped) counts as gone.
func processAlive(pid int) bool {
	if pid <= 0 {
		return false
	}
	if err := syscall.Kill(pid, 0); err != nil && !errors.Is(err, syscall.EPERM) {
		return false
	}
	stat, err := os.ReadFile(fmt.Sprintf("/proc/%d/stat", pid))
	if err != nil {
		return true // no /proc: trust kill
	}
	// The state follows the command name, which is in parentheses and may
	// itself contain ") ".
	if i := strings.LastIndexByte(string(stat), ')'); i >= 0 && i+2 < len(stat) {
		return stat[i+2] != 'Z'
	}
	return true
}

// processName is the command name of pid, "" when it cannot be read.
func processName(pid int) string {
	b, err := os.ReadFile(fmt.Sprintf("/proc/%d/comm", pid))
	if err != nil {
		return ""
	}
	return strings.TrimSpace(string(b))
}
