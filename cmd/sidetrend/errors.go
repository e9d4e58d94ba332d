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
