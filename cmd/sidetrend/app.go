package main

import (
	"fmt"
	"runtime/debug"

	"github.com/urfave/cli/v2"
)

// version is set at build time with -ldflags "-X main.version=..."; otherwise
// it comes from the module build info.
var version = ""

func versionString() string {
	if version != "" {
		return version
	}
	if bi, ok := debug.ReadBuildInfo(); ok && bi.Main.Version != "" {
		return bi.Main.Version
	}
	return "devel"
}

func newApp() *cli.App {
	return &cli.App{
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
}
