package pgtest

import (
	"context"
	"strings"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"
)

// Dump returns every row of the named tables of a database as text, in
// primary key order, for tests that check a request changed nothing.
func Dump(t testing.TB, databaseURL string, tables ...string) string {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
	defer cancel()
	conn, err := pgx.Connect(ctx, databaseURL)
	if err != nil {
		t.Fatalf("pgtest: connect: %v", err)
	}
	defer conn.Close(ctx)
	var b strings.Builder
	for _, table := range tables {
		b.WriteString("-- " + table + "\n")
		rows, err := conn.Query(ctx, `SELECT r::text FROM `+ident(table)+` r ORDER BY 1`)
		if err != nil {
			t.Fatalf("pgtest: dump %s: %v", table, err)
		}
		lines, err := pgx.CollectRows(rows, pgx.RowTo[string])
		if err != nil {
			t.Fatalf("pgtest: dump %s: %v", table, err)
		}
		for _, l := range lines {
			b.WriteString(l + "\n")
		}
	}
	return b.String()
}

// Exec runs one statement against a database, for tests that change data
// behind the service's back (as another client or an operator would).
func Exec(t testing.TB, databaseURL, sql string, args ...any) {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
	defer cancel()
	conn, err := pgx.Connect(ctx, databaseURL)
	if err != nil {
		t.Fatalf("pgtest: connect: %v", err)
	}
	defer conn.Close(ctx)
	if _, err := conn.Exec(ctx, sql, args...); err != nil {
		t.Fatalf("pgtest: %s: %v", sql, err)
	}
}
