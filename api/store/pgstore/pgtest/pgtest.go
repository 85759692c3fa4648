// Package pgtest gives tests a PostgreSQL database of their own on the server
// named in DEADSPACE_TEST_POSTGRES_URL (a postgres:// URL of a role that may
// create databases). `.ci/test` sets it, starting a throwaway cluster when no
// server is given (see .ci/postgres); `.ci/postgres go test ./...` does the
// same for any command.
//
// Without it the tests that need PostgreSQL skip, except under CI=true, where
// they fail: a run that cannot reach its database must not pass.
package pgtest

import (
	"context"
	"crypto/rand"
	"encoding/hex"
	"fmt"
	"net/url"
	"os"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"
)

// EnvURL names the environment variable that points the tests at a server.
const EnvURL = "DEADSPACE_TEST_POSTGRES_URL"

// ServerURL returns the server's URL, or skips the test (fails it under
// CI=true) when none is configured.
func ServerURL(t testing.TB) string {
	t.Helper()
	raw := os.Getenv(EnvURL)
	if raw == "" {
		if os.Getenv("CI") == "true" {
			t.Fatalf("%s is not set and CI=true: the PostgreSQL tests must run (./.ci/test starts a throwaway cluster)", EnvURL)
		}
		t.Skipf("%s is not set (run through ./.ci/test or `.ci/postgres go test ...`)", EnvURL)
	}
	return raw
}

// NewDatabase creates an empty database for the test, drops it when the test
// ends, and returns its URL. Each test gets its own, so packages and tests run
// in parallel without seeing each other's rows.
func NewDatabase(t testing.TB) string {
	t.Helper()
	server := ServerURL(t)
	u, err := url.Parse(server)
	if err != nil || (u.Scheme != "postgres" && u.Scheme != "postgresql") {
		t.Fatalf("%s must be a postgres:// URL, got %q (%v)", EnvURL, server, err)
	}
	var suffix [6]byte
	_, _ = rand.Read(suffix[:])
	name := "deadspace_test_" + hex.EncodeToString(suffix[:])

	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	admin, err := pgx.Connect(ctx, server)
	if err != nil {
		t.Fatalf("connect to the test server %s: %v", redact(u), err)
	}
	defer admin.Close(ctx)
	if _, err := admin.Exec(ctx, "CREATE DATABASE "+pgx.Identifier{name}.Sanitize()); err != nil {
		t.Fatalf("create test database: %v", err)
	}
	t.Cleanup(func() {
		ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
		defer cancel()
		conn, err := pgx.Connect(ctx, server)
		if err != nil {
			t.Errorf("connect to drop test database %s: %v", name, err)
			return
		}
		defer conn.Close(ctx)
		// FORCE ends sessions a failed test may have left open.
		if _, err := conn.Exec(ctx, "DROP DATABASE IF EXISTS "+pgx.Identifier{name}.Sanitize()+" WITH (FORCE)"); err != nil {
			t.Errorf("drop test database %s: %v", name, err)
		}
	})
	u.Path = "/" + name
	return u.String()
}

// NewSchema creates an empty schema for the test in the server's database,
// drops it with everything in it when the test ends, and returns a URL whose
// connections use it (search_path). It is ten times quicker than
// NewDatabase, for the many tests that only need tables of their own;
// advisory locks, which are per database, are then shared with other tests.
func NewSchema(t testing.TB) string {
	t.Helper()
	server := ServerURL(t)
	u, err := url.Parse(server)
	if err != nil || (u.Scheme != "postgres" && u.Scheme != "postgresql") {
		t.Fatalf("%s must be a postgres:// URL, got %q (%v)", EnvURL, server, err)
	}
	var suffix [6]byte
	_, _ = rand.Read(suffix[:])
	name := "deadspace_test_" + hex.EncodeToString(suffix[:])
	exec := func(sql string) error {
		ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
		defer cancel()
		conn, err := pgx.Connect(ctx, server)
		if err != nil {
			return fmt.Errorf("connect to the test server %s: %w", redact(u), err)
		}
		defer conn.Close(ctx)
		_, err = conn.Exec(ctx, sql)
		return err
	}
	if err := exec("CREATE SCHEMA " + pgx.Identifier{name}.Sanitize()); err != nil {
		t.Fatalf("create test schema: %v", err)
	}
	t.Cleanup(func() {
		if err := exec("DROP SCHEMA IF EXISTS " + pgx.Identifier{name}.Sanitize() + " CASCADE"); err != nil {
			t.Errorf("drop test schema %s: %v", name, err)
		}
	})
	q := u.Query()
	q.Set("search_path", name)
	u.RawQuery = q.Encode()
	return u.String()
}

func redact(u *url.URL) string {
	return fmt.Sprintf("%s://%s%s", u.Scheme, u.Host, u.Path)
}
