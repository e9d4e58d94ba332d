// Package migrations holds sidetrend's versioned schema changes as numbered
// SQL files in pressly/goose format, embedded in the binary. Each file runs
// once, in its own transaction, recorded in sidetrend.schema_migrations.
package migrations

import "embed"

// FS holds the migration files, NNNNN_name.sql, applied in version order.
//
//go:embed *.sql
var FS embed.FS
