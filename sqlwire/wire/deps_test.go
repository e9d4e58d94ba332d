package wire

import (
	"go/parser"
	"go/token"
	"path/filepath"
	"strconv"
	"strings"
	"testing"
)

// TestImportsNoQueryHandling holds the dependency direction of
// DEVELOPERS.md: the protocol imports neither the query handling
// (sqlwire) nor the tables (sqlwire/livetables), nor anything else of
// sidetrend.
func TestImportsNoQueryHandling(t *testing.T) {
	files, err := filepath.Glob("*.go")
	if err != nil {
		t.Fatal(err)
	}
	fset := token.NewFileSet()
	for _, name := range files {
		if strings.HasSuffix(name, "_test.go") {
			continue
		}
		f, err := parser.ParseFile(fset, name, nil, parser.ImportsOnly)
		if err != nil {
			t.Fatal(err)
		}
		for _, imp := range f.Imports {
			path, _ := strconv.Unquote(imp.Path.Value)
			if strings.HasPrefix(path, "github.com/sidetrend/sidetrend/") {
				t.Errorf("%s imports %s: package wire must not depend on the rest of sidetrend", name, path)
			}
		}
	}
}
