package main

import (
	"context"
	"strings"
	"testing"

	"github.com/urfave/cli/v2"
)

// TestEveryFlagReadsTheEnvironment: every flag of every command names an
// environment variable (as the README says), and one works.
func TestEveryFlagReadsTheEnvironment(t *testing.T) {
	app := newApp()
	var walk func(prefix string, cmds []*cli.Command)
	walk = func(prefix string, cmds []*cli.Command) {
		for _, c := range cmds {
			for _, f := range c.Flags {
				df, ok := f.(cli.DocGenerationFlag)
				if !ok || len(df.GetEnvVars()) == 0 {
					t.Errorf("%s %s --%s reads no environment variable", prefix, c.Name, f.Names()[0])
				}
			}
			walk(prefix+" "+c.Name, c.Subcommands)
		}
	}
	walk("sidetrend", app.Commands)
	for _, f := range app.Flags {
		if df, ok := f.(cli.DocGenerationFlag); !ok || len(df.GetEnvVars()) == 0 {
			t.Errorf("sidetrend --%s reads no environment variable", f.Names()[0])
		}
	}

	url, _ := salesDB(t)
	t.Setenv("SIDETREND_STATUS_FORMAT", "json")
	out, err := runCLI(t, context.Background(), "status", "--db", url)
	if err != nil || !strings.HasPrefix(strings.TrimSpace(out), "{") {
		t.Errorf("status with SIDETREND_STATUS_FORMAT=json: %v\n%s", err, out)
	}
}
