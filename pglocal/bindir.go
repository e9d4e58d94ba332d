package pglocal

import (
	"fmt"
	"os"
	"os/exec"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
)

// InstallHint says how to get the PostgreSQL server binaries on this machine.
// It is part of the error FindBinDir returns.
const InstallHint = "run `make postgres`, or as root: apt-get update && apt-get install -y --no-install-recommends postgresql postgresql-contrib"

// debianLibRoot is where Debian and Ubuntu install one bin directory per
// major version (/usr/lib/postgresql/15/bin), off PATH.
const debianLibRoot = "/usr/lib/postgresql"

// serverBinaries are the programs Start runs. pg_ctl is not needed: Start
// runs the postmaster itself so that it can track it by pid.
var serverBinaries = []string{"initdb", "postgres"}

// FindBinDir returns the directory that holds the PostgreSQL server binaries
// initdb and postgres. It looks on PATH first and then in
// /usr/lib/postgresql/*/bin, newest major version first. A binary found on
// PATH through a symbolic link is reported by the directory it links to, so
// that the server's share and lib directories are found beside it.
func FindBinDir() (string, error) {
	return findBinDir(os.Getenv("PATH"), debianLibRoot)
}

func findBinDir(pathList, libRoot string) (string, error) {
	for _, dir := range filepath.SplitList(pathList) {
		if dir == "" || !hasServerBinaries(dir) {
			continue
		}
		abs, err := filepath.Abs(dir)
		if err != nil {
			continue
		}
		if target, err := filepath.EvalSymlinks(filepath.Join(abs, "initdb")); err == nil && hasServerBinaries(filepath.Dir(target)) {
			return filepath.Dir(target), nil
		}
		return abs, nil
	}
	for _, dir := range versionBinDirs(libRoot) {
		if hasServerBinaries(dir) {
			return dir, nil
		}
	}
	return "", fmt.Errorf("pglocal: the PostgreSQL server binaries (%s) are neither on PATH nor in %s/*/bin: %s",
		strings.Join(serverBinaries, ", "), libRoot, InstallHint)
}

func hasServerBinaries(dir string) bool {
	for _, name := range serverBinaries {
		if !isExecutable(filepath.Join(dir, name)) {
			return false
		}
	}
	return true
}

func isExecutable(path string) bool {
	fi, err := os.Stat(path)
	if err != nil || fi.IsDir() {
		return false
	}
	// exec.LookPath on an absolute path checks the mode bits for us.
	_, err = exec.LookPath(path)
	return err == nil
}

// versionBinDirs lists root/<version>/bin for every entry of root whose name
// is a version number ("9.6", "15"), newest first.
func versionBinDirs(root string) []string {
	entries, err := os.ReadDir(root)
	if err != nil {
		return nil
	}
	type versioned struct {
		v   []int
		dir string
	}
	var found []versioned
	for _, e := range entries {
		v, ok := parseVersion(e.Name())
		if !ok {
			continue
		}
		found = append(found, versioned{v, filepath.Join(root, e.Name(), "bin")})
	}
	slices.SortFunc(found, func(a, b versioned) int { return -slices.Compare(a.v, b.v) })
	dirs := make([]string, len(found))
	for i, f := range found {
		dirs[i] = f.dir
	}
	return dirs
}

// parseVersion reads "15" or "9.6" as its numeric parts.
func parseVersion(s string) ([]int, bool) {
	var v []int
	for part := range strings.SplitSeq(s, ".") {
		n, err := strconv.Atoi(part)
		if err != nil || n < 0 {
			return nil, false
		}
		v = append(v, n)
	}
	return v, true
}
