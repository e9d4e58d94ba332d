package main

import (
	"errors"
	"strings"

	"github.com/jackc/pgx/v5/pgconn"
	"github.com/urfave/cli/v2"
)

// serverError is an error with a Postgres error inside: its message carries
// the server's DETAIL and HINT, which say what to change (pgconn's own
// message has only the primary text and the SQLSTATE).
type serverError struct{ err error }

func (e *serverError) Unwrap() error { return e.err }

func (e *serverError) Error() string {
	var b strings.Builder
	b.WriteString(e.err.Error())
	var pg *pgconn.PgError
	if errors.As(e.err, &pg) {
		if pg.Detail != "" && !strings.Contains(b.String(), pg.Detail) {
			b.WriteString("\nDETAIL: " + pg.Detail)
		}
		if pg.Hint != "" && !strings.Contains(b.String(), pg.Hint) {
			b.WriteString("\nHINT: " + pg.Hint)
		}
	}
	return b.String()
}

// withServerDetail wraps the action of every command (and subcommand) so
// that a Postgres error reaches the user with its DETAIL and HINT.
func withServerDetail(cmds []*cli.Command) {
	for _, c := range cmds {
		withServerDetail(c.Subcommands)
		if c.Action == nil {
			continue
		}
		action := c.Action
		c.Action = func(ctx *cli.Context) error {
			err := action(ctx)
			var pg *pgconn.PgError
			if err != nil && errors.As(err, &pg) && (pg.Detail != "" || pg.Hint != "") {
				return &serverError{err}
			}
			return err
		}
	}
}

// withEnvVars gives every flag that names no environment variable of its
// own one: SIDETREND_, the command's name and the flag's name, in capitals
// with - as _ (sidetrend track --table: SIDETREND_TRACK_TABLE). A flag
// given on the command line wins over its variable.
func withEnvVars(cmds []*cli.Command, prefix string) {
	for _, c := range cmds {
		p := prefix + "_" + envName(c.Name)
		withEnvVars(c.Subcommands, p)
		for _, f := range c.Flags {
			name := p + "_" + envName(f.Names()[0])
			switch f := f.(type) {
			case *cli.StringFlag:
				f.EnvVars = orEnv(f.EnvVars, name)
			case *cli.IntFlag:
				f.EnvVars = orEnv(f.EnvVars, name)
			case *cli.Int64Flag:
				f.EnvVars = orEnv(f.EnvVars, name)
			case *cli.Float64Flag:
				f.EnvVars = orEnv(f.EnvVars, name)
			case *cli.BoolFlag:
				f.EnvVars = orEnv(f.EnvVars, name)
			case *cli.DurationFlag:
				f.EnvVars = orEnv(f.EnvVars, name)
			case *cli.StringSliceFlag:
				f.EnvVars = orEnv(f.EnvVars, name)
			case *cli.TimestampFlag:
				f.EnvVars = orEnv(f.EnvVars, name)
			}
		}
	}
}

func orEnv(have []string, name string) []string {
	if len(have) > 0 {
		return have
	}
	return []string{name}
}

func envName(s string) string { return strings.ToUpper(strings.ReplaceAll(s, "-", "_")) }
