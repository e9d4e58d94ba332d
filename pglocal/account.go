package pglocal

import (
	"context"
	"errors"
	"fmt"
	"io/fs"
	"os"
	"os/exec"
	"os/user"
	"path/filepath"
	"strconv"
	"sync"
	"syscall"
	"time"
)

// ServerUser is the unprivileged OS user the server runs as when this
// process is root: Postgres refuses to run as root.
const ServerUser = "sidetrend"

// account is the OS user initdb and postgres run as. A nil *account means
// the user this process runs as.
type account struct {
	name     string
	uid, gid uint32
}

// accountMu serialises the creation of ServerUser within this process;
// other processes creating it at the same moment are handled by looking
// the user up again.
var accountMu sync.Mutex

// serverAccount returns nil when this process is not root, and otherwise
// ServerUser, created with useradd when it does not exist yet.
func serverAccount(ctx context.Context) (*account, error) {
	if os.Geteuid() != 0 {
		return nil, nil
	}
	accountMu.Lock()
	defer accountMu.Unlock()
	if a, err := lookupAccount(ServerUser); err == nil {
		return a, nil
	} else if !errors.As(err, new(user.UnknownUserError)) {
		return nil, fmt.Errorf("pglocal: look up OS user %q: %w", ServerUser, err)
	}
	useradd, err := exec.LookPath("useradd")
	if err != nil {
		useradd = "/usr/sbin/useradd"
	}
	// useradd fails while another process holds the passwd lock (exit 10)
	// or has just created the same user (exit 9): look again, a few times.
	retry := time.NewTicker(100 * time.Millisecond)
	defer retry.Stop()
	var out []byte
	for attempt := 0; attempt < 20; attempt++ {
		out, err = exec.CommandContext(ctx, useradd, "--system", "--no-create-home",
			"--shell", "/usr/sbin/nologin", ServerUser).CombinedOutput()
		if a, lerr := lookupAccount(ServerUser); lerr == nil {
			return a, nil
		}
		select {
		case <-ctx.Done():
			return nil, fmt.Errorf("pglocal: create OS user %q: %w", ServerUser, ctx.Err())
		case <-retry.C:
		}
	}
	return nil, fmt.Errorf("pglocal: Postgres refuses to run as root and the OS user %q to run it as could not be created (%v: %s): create it with `useradd --system --no-create-home --shell /usr/sbin/nologin %s`, or run as a non-root user",
		ServerUser, err, out, ServerUser)
}

func lookupAccount(name string) (*account, error) {
	u, err := user.Lookup(name)
	if err != nil {
		return nil, err
	}
	uid, err := strconv.ParseUint(u.Uid, 10, 32)
	if err != nil {
		return nil, fmt.Errorf("uid %q of %s: %w", u.Uid, name, err)
	}
	gid, err := strconv.ParseUint(u.Gid, 10, 32)
	if err != nil {
		return nil, fmt.Errorf("gid %q of %s: %w", u.Gid, name, err)
	}
	return &account{name: name, uid: uint32(uid), gid: uint32(gid)}, nil
}

// credential is what exec needs to run a child as a; nil runs it as this
// process's user.
func (a *account) credential() *syscall.Credential {
	if a == nil {
		return nil
	}
	return &syscall.Credential{Uid: a.uid, Gid: a.gid}
}

// own gives path to a; nothing to do when a is this process's user.
func (a *account) own(path string) error {
	if a == nil {
		return nil
	}
	if err := os.Lchown(path, int(a.uid), int(a.gid)); err != nil {
		return fmt.Errorf("pglocal: give %s to OS user %s: %w", path, a.name, err)
	}
	return nil
}

// checkOwner reports a clear error when an initialised data directory
// belongs to someone other than the user the server will run as; Postgres
// would refuse it with "data directory has wrong ownership".
func (a *account) checkOwner(dataDir string) error {
	fi, err := os.Stat(dataDir)
	if err != nil {
		return fmt.Errorf("pglocal: %w", err)
	}
	st, ok := fi.Sys().(*syscall.Stat_t)
	if !ok {
		return nil
	}
	want, who := uint32(os.Geteuid()), "this process's user"
	if a != nil {
		want, who = a.uid, "OS user "+a.name
	}
	if st.Uid != want {
		return fmt.Errorf("pglocal: data directory %s belongs to uid %d, but the server runs as %s (uid %d): chown -R it to that user or choose another DataDir",
			dataDir, st.Uid, who, want)
	}
	return nil
}

// checkReachable reports a clear error when a cannot enter every directory
// above dir; initdb and postgres would fail with "permission denied".
func (a *account) checkReachable(dir string) error {
	if a == nil {
		return nil
	}
	for d := filepath.Dir(dir); ; d = filepath.Dir(d) {
		fi, err := os.Stat(d)
		if err != nil {
			return fmt.Errorf("pglocal: %w", err)
		}
		if !a.canEnter(fi) {
			return fmt.Errorf("pglocal: Postgres refuses to run as root, so the server runs as OS user %s, which cannot enter %s (mode %v): choose a DataDir that user can reach (under %s, say) or `chmod o+x %s`",
				a.name, d, fi.Mode().Perm(), os.TempDir(), d)
		}
		if d == filepath.Dir(d) {
			return nil
		}
	}
}

func (a *account) canEnter(fi fs.FileInfo) bool {
	perm := fi.Mode().Perm()
	st, ok := fi.Sys().(*syscall.Stat_t)
	switch {
	case !ok:
		return perm&0o001 != 0
	case st.Uid == a.uid:
		return perm&0o100 != 0
	case st.Gid == a.gid:
		return perm&0o010 != 0
	default:
		return perm&0o001 != 0
	}
}
