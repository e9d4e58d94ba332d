package main

import (
	"context"
	"runtime/debug"
	"strings"
	"testing"
)

// TestCommandMessages: rebuild and untrack say what they did in words that
// add up.
func TestCommandMessages(t *testing.T) {
	url, _ := salesDB(t)
	ctx := context.Background()
	for _, c := range []struct {
		args []string
		want string
	}{
		{[]string{"rebuild", "--db", url}, "1 tracker queued for a reread from the source; this run reread 1 tracker and replayed 2 series\n"},
		{[]string{"rebuild", "--db", url, "--tracker", "sales", "--series", "north"}, `series "north" of tracker sales queued for a reread from the source; this run replayed 1 series` + "\n"},
		{[]string{"untrack", "--db", url, "sales"}, "untracked sales: removed its capture triggers, 2 series, 239 bucket points, 0 pending changes, 0 rejects and "},
	} {
		out, err := runCLI(t, ctx, c.args...)
		if err != nil || !strings.Contains(out, c.want) {
			t.Errorf("%v: %v\n%q\nwant %q", c.args[0], err, out, c.want)
		}
	}
}

// TestVersion: the version line carries the commit from the build info.
func TestVersion(t *testing.T) {
	bi := &debug.BuildInfo{GoVersion: "go1.26.8", Main: debug.Module{Path: "github.com/sidetrend/sidetrend", Version: "(devel)"},
		Settings: []debug.BuildSetting{{Key: "vcs.revision", Value: "0123456789abcdef0123"}, {Key: "vcs.time", Value: "2026-12-02T10:00:00Z"},
			{Key: "vcs.modified", Value: "true"}}}
	if got, want := versionFrom("", bi), "(devel), commit 0123456789ab of 2026-12-02T10:00:00Z (modified), built with go1.26.8"; got != want {
		t.Errorf("versionFrom = %q, want %q", got, want)
	}
	if got := versionFrom("v1.2.0", &debug.BuildInfo{Main: debug.Module{Version: "v0.0.0"}}); got != "v1.2.0" {
		t.Errorf("versionFrom with -X main.version = %q", got)
	}
	out, err := runCLI(t, context.Background(), "version")
	if err != nil || !strings.HasPrefix(out, "sidetrend ") {
		t.Errorf("version: %v %q", err, out)
	}
}
