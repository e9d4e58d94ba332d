package main

import (
	"fmt"
	"runtime/debug"

	"github.com/urfave/cli/v2"
)

// version is set at build time with -ldflags "-X main.version=..."; otherwise
// it comes from the module build info. commit likewise (make build sets it
// from git): Go stamps the commit itself only in a checkout whose .git is a
// directory, not in a git worktree.
var version, commit = "", ""

func versionString() string {
	bi, _ := debug.ReadBuildInfo()
	if commit != "" {
		if bi == nil {
			bi = &debug.BuildInfo{}
		}
		bi.Settings = append(bi.Settings, debug.BuildSetting{Key: "vcs.revision", Value: commit})
	}
	return versionFrom(version, bi)
}

// versionFrom is the version line: the version given at build time or the
// module's (a tagged module version, or "(devel)" for a build from a
// checkout), then the commit and its time from the build's VCS stamp, with
// "modified" when the checkout had uncommitted changes, and the Go version.
func versionFrom(given string, bi *debug.BuildInfo) string {
	v := given
	if v == "" && bi != nil {
		v = bi.Main.Version
	}
	if v == "" {
		v = "(devel)"
	}
	if bi == nil {
		return v
	}
	var rev, at string
	modified := false
	for _, s := range bi.Settings {
		switch s.Key {
		case "vcs.revision":
			rev = s.Value
		case "vcs.time":
			at = s.Value
		case "vcs.modified":
			modified = s.Value == "true"
		}
	}
	if rev != "" {
		v += ", commit " + rev[:min(12, len(rev))]
		if at != "" {
			v += " of " + at
		}
		if modified {
			v += " (modified)"
		}
	}
	if bi.GoVersion != "" {
		v += ", built with " + bi.GoVersion
	}
	return v
}

func newApp() *cli.App {
	app := &cli.App{
		Name:    "sidetrend",
		Usage:   "keep short-term forecasts and trend slopes for Postgres time series current, served to plain SQL",
		Version: versionString(),
		Description: "Forecasts and intervals are estimates under model assumptions (a local polynomial\n" +
			"trend plus optional harmonics, errors independent with constant variance). They\n" +
			"inform decisions; the decisions stay with people.",
		Flags: []cli.Flag{
			&cli.BoolFlag{Name: "verbose", Usage: "log debug messages", EnvVars: []string{"SIDETREND_VERBOSE"}},
		},
		Commands: []*cli.Command{
			migrateCommand(),
			trackCommand(),
			untrackCommand(),
			alterCommand(),
			runCommand(),
			rebuildCommand(),
			tuneCommand(),
			statusCommand(),
			plotCommand(),
			forecastCommand(),
			backtestCommand(),
			demoCommand(),
			{
				Name:  "version",
				Usage: "print the version",
				Action: func(c *cli.Context) error {
					fmt.Fprintln(c.App.Writer, "sidetrend", versionString())
					return nil
				},
			},
		},
	}
	withServerDetail(app.Commands)
	withEnvVars(app.Commands, "SIDETREND")
	return app
}
