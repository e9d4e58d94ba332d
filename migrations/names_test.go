package migrations

import (
	"bufio"
	"bytes"
	"io/fs"
	"os"
	"path/filepath"
	"regexp"
	"strconv"
	"strings"
	"testing"
)

// oldNames reads testdata/old_names.txt: the column names migration 00008
// replaced, one a line, lower case.
func oldNames(t *testing.T) []string {
	t.Helper()
	b, err := os.ReadFile("../testdata/old_names.txt")
	if err != nil {
		t.Fatal(err)
	}
	var names []string
	sc := bufio.NewScanner(bytes.NewReader(b))
	for sc.Scan() {
		if line := strings.TrimSpace(sc.Text()); line != "" && !strings.HasPrefix(line, "#") {
			names = append(names, strings.ToLower(line))
		}
	}
	if len(names) == 0 {
		t.Fatal("testdata/old_names.txt lists no names")
	}
	return names
}

// namedVersion matches a migration file name and captures its version.
var namedVersion = regexp.MustCompile(`^migrations/(\d{5})_[a-z0-9_]+\.sql$`)

// TestNoOldNamesInRepository reads every file of the repository and fails
// on any that spells a replaced column name, in any letter case. The
// migrations up to 00008 are history (they create those columns and 00008
// renames them) and the list itself names them; nothing else may.
func TestNoOldNamesInRepository(t *testing.T) {
	names := oldNames(t)
	root := ".."
	checked := 0
	err := filepath.WalkDir(root, func(path string, d fs.DirEntry, err error) error {
		if err != nil {
			return err
		}
		rel, err := filepath.Rel(root, path)
		if err != nil {
			return err
		}
		rel = filepath.ToSlash(rel)
		if d.IsDir() {
			if rel != "." && (strings.HasPrefix(d.Name(), ".") || rel == "bin") {
				return filepath.SkipDir
			}
			return nil
		}
		if rel == "testdata/old_names.txt" {
			return nil
		}
		if m := namedVersion.FindStringSubmatch(rel); m != nil {
			if v, _ := strconv.Atoi(m[1]); v <= 8 {
				return nil
			}
		}
		if !d.Type().IsRegular() {
			return nil
		}
		b, err := os.ReadFile(path)
		if err != nil {
			return err
		}
		if bytes.IndexByte(b, 0) >= 0 {
			return nil // binary: a built program, an image
		}
		checked++
		lower := bytes.ToLower(b)
		for _, name := range names {
			if i := bytes.Index(lower, []byte(name)); i >= 0 {
				line := 1 + bytes.Count(b[:i], []byte("\n"))
				t.Errorf("%s:%d spells %q, a name migration 00008 replaced", rel, line, name)
			}
		}
		return nil
	})
	if err != nil {
		t.Fatal(err)
	}
	if checked < 50 {
		t.Fatalf("read %d files; want the whole repository", checked)
	}
}
