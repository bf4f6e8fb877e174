// Package migrations embeds the database schema as goose SQL files, so the
// binary carries the schema it needs and applies it with goose's Provider.
package migrations

import "embed"

// Files holds the numbered SQL migrations.
//
//go:embed *.sql
var Files embed.FS
