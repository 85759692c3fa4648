package pgstore

import (
	"context"
	"embed"
	"errors"
	"fmt"
	"io/fs"
	"regexp"
	"sort"
	"strconv"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgxpool"
)

//go:embed migrations/*.sql
var migrationFiles embed.FS

// ErrSchemaTooNew means the database was migrated by a newer deadspace than
// this one: its tables may mean things this binary does not know, so it
// refuses to start rather than misread or damage them.
var ErrSchemaTooNew = errors.New("pgstore: the database schema is newer than this binary")

// migrationLock is the advisory lock key that serializes migrations across
// replicas ("deadspac" in ASCII). Advisory locks are per database, so
// deadspace databases on one server do not wait for each other.
const migrationLock int64 = 0x6465616473706163

type migration struct {
	version int
	name    string
	sql     string
}

// migrateUnlockTimeout bounds the unlock after a canceled migration.
const migrateUnlockTimeout = 10 * time.Second

var migrationName = regexp.MustCompile(`^(\d{4})_([a-z0-9_]+)\.sql$`)

// migrations returns the embedded migrations in version order, checking
// that versions run 1, 2, 3… with no gap or repeat.
func migrations() ([]migration, error) {
	entries, err := fs.ReadDir(migrationFiles, "migrations")
	if err != nil {
		return nil, err
	}
	var ms []migration
	for _, e := range entries {
		m := migrationName.FindStringSubmatch(e.Name())
		if m == nil {
			return nil, fmt.Errorf("pgstore: migration file %q is not named NNNN_name.sql", e.Name())
		}
		body, err := fs.ReadFile(migrationFiles, "migrations/"+e.Name())
		if err != nil {
			return nil, err
		}
		v, _ := strconv.Atoi(m[1])
		ms = append(ms, migration{version: v, name: m[2], sql: string(body)})
	}
	sort.Slice(ms, func(i, j int) bool { return ms[i].version < ms[j].version })
	for i, m := range ms {
		if m.version != i+1 {
			return nil, fmt.Errorf("pgstore: migration versions must run 1, 2, 3…; found %04d_%s at position %d", m.version, m.name, i+1)
		}
	}
	return ms, nil
}

// SchemaVersion is the newest schema this binary knows.
func SchemaVersion() int {
	ms, err := migrations()
	if err != nil || len(ms) == 0 {
		return 0
	}
	return ms[len(ms)-1].version
}

// Migrate brings the database's schema up to this binary's version and
// returns the versions it applied (none when it was current). It holds an
// advisory lock while it reads and changes the schema, so replicas that
// start together apply each migration once: the others wait, then find
// nothing left to do. Each migration commits with its version row, so a
// failure leaves the schema at the last whole version.
func Migrate(ctx context.Context, pool *pgxpool.Pool) ([]int, error) {
	ms, err := migrations()
	if err != nil {
		return nil, err
	}
	return migrate(ctx, pool, ms)
}

// migrate applies ms, the first versions in order; tests pass fewer than
// the binary has to stand for an earlier release.
func migrate(ctx context.Context, pool *pgxpool.Pool, ms []migration) ([]int, error) {
	conn, err := pool.Acquire(ctx)
	if err != nil {
		return nil, wrap("migrate: connect", err)
	}
	defer conn.Release()
	if _, err := conn.Exec(ctx, "SELECT pg_advisory_lock($1)", migrationLock); err != nil {
		return nil, wrap("migrate: wait for the migration lock", err)
	}
	defer func() {
		// A session lock outlives a canceled ctx: unlock on a fresh one,
		// and drop the connection if even that fails.
		unlockCtx, cancel := context.WithTimeout(context.WithoutCancel(ctx), migrateUnlockTimeout)
		defer cancel()
		if _, err := conn.Exec(unlockCtx, "SELECT pg_advisory_unlock($1)", migrationLock); err != nil {
			_ = conn.Hijack().Close(unlockCtx)
		}
	}()

	if _, err := conn.Exec(ctx, `CREATE TABLE IF NOT EXISTS schema_migrations (
		version    integer     PRIMARY KEY,
		name       text        NOT NULL,
		applied_at timestamptz NOT NULL DEFAULT now())`); err != nil {
		return nil, wrap("migrate: create schema_migrations", err)
	}
	var current int
	var currentName string
	err = conn.QueryRow(ctx, `SELECT version, name FROM schema_migrations ORDER BY version DESC LIMIT 1`).Scan(&current, &currentName)
	if err != nil && !errors.Is(err, pgx.ErrNoRows) {
		return nil, wrap("migrate: read the schema version", err)
	}
	latest := ms[len(ms)-1].version
	if current > latest {
		return nil, fmt.Errorf("%w: the database is at schema version %d (%s), this deadspace knows versions up to %d (%s); "+
			"run a deadspace at least as new as the one that migrated this database, or point --store at another database",
			ErrSchemaTooNew, current, currentName, latest, ms[len(ms)-1].name)
	}
	var applied []int
	for _, m := range ms[current:] {
		err := pgx.BeginFunc(ctx, conn, func(tx pgx.Tx) error {
			if _, err := tx.Exec(ctx, m.sql); err != nil {
				return err
			}
			_, err := tx.Exec(ctx, `INSERT INTO schema_migrations (version, name) VALUES ($1, $2)`, m.version, m.name)
			return err
		})
		if err != nil {
			return applied, wrap(fmt.Sprintf("migrate: apply %04d_%s", m.version, m.name), err)
		}
		applied = append(applied, m.version)
	}
	return applied, nil
}
