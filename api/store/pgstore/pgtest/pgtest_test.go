package pgtest

import (
	"context"
	"testing"

	"github.com/jackc/pgx/v5"
)

// Two databases from one server are distinct and empty: tests in parallel
// packages must not see each other's tables.
func TestNewDatabaseIsolated(t *testing.T) {
	ctx := context.Background()
	first, second := NewDatabase(t), NewDatabase(t)
	if first == second {
		t.Fatalf("two tests got the same database %s", first)
	}
	a, err := pgx.Connect(ctx, first)
	if err != nil {
		t.Fatal(err)
	}
	defer a.Close(ctx)
	if _, err := a.Exec(ctx, "CREATE TABLE only_here (x int)"); err != nil {
		t.Fatal(err)
	}
	b, err := pgx.Connect(ctx, second)
	if err != nil {
		t.Fatal(err)
	}
	defer b.Close(ctx)
	var n int
	if err := b.QueryRow(ctx, "SELECT count(*) FROM pg_tables WHERE tablename = 'only_here'").Scan(&n); err != nil {
		t.Fatal(err)
	}
	if n != 0 {
		t.Fatalf("a table made in one test database is visible in another")
	}
}

// A table made through one schema's URL lands in that schema only.
func TestNewSchemaIsolated(t *testing.T) {
	ctx := context.Background()
	first, second := NewSchema(t), NewSchema(t)
	a, err := pgx.Connect(ctx, first)
	if err != nil {
		t.Fatal(err)
	}
	defer a.Close(ctx)
	if _, err := a.Exec(ctx, "CREATE TABLE only_here (x int)"); err != nil {
		t.Fatal(err)
	}
	b, err := pgx.Connect(ctx, second)
	if err != nil {
		t.Fatal(err)
	}
	defer b.Close(ctx)
	if _, err := b.Exec(ctx, "SELECT * FROM only_here"); err == nil {
		t.Fatalf("a table made in one test schema is visible from another")
	}
	// And the second can make its own of the same name.
	if _, err := b.Exec(ctx, "CREATE TABLE only_here (x int)"); err != nil {
		t.Fatal(err)
	}
}
