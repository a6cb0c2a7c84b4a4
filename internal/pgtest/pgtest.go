// Package pgtest gives store tests and benchmarks a private PostgreSQL
// schema each.
//
// The server comes from the environment variable FILTRATE_TEST_POSTGRES
// (default postgres://postgres@127.0.0.1:5432/test?sslmode=disable). When it
// cannot be reached the test is skipped, except when CI=true, where it fails:
// CI must never skip the PostgreSQL tests.
package pgtest

import (
	"context"
	"crypto/rand"
	"database/sql"
	"encoding/hex"
	"net/url"
	"os"
	"testing"
	"time"

	_ "github.com/lib/pq" // PostgreSQL driver "postgres"
)

// DefaultDSN is used when FILTRATE_TEST_POSTGRES is unset.
const DefaultDSN = "postgres://postgres@127.0.0.1:5432/test?sslmode=disable"

// ServerDSN returns the test server's DSN.
func ServerDSN() string {
	if v := os.Getenv("FILTRATE_TEST_POSTGRES"); v != "" {
		return v
	}
	return DefaultDSN
}

// Fresh creates an empty schema, drops it when tb ends, and returns a DSN
// whose search_path selects it (lib/pq passes unknown URL parameters to the
// server as run-time parameters).
func Fresh(tb testing.TB) string {
	tb.Helper()
	dsn, _ := FreshSchema(tb)
	return dsn
}

// Connect opens the test server with the DSN's own (superuser) role and
// closes it when tb ends; it skips or fails tb when the server is
// unreachable.
func Connect(tb testing.TB) *sql.DB {
	tb.Helper()
	db, err := sql.Open("postgres", ServerDSN())
	if err != nil {
		tb.Fatalf("pgtest: open: %v", err)
	}
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Second)
	defer cancel()
	if err := db.PingContext(ctx); err != nil {
		db.Close()
		if os.Getenv("CI") == "true" {
			tb.Fatalf("pgtest: PostgreSQL unreachable (CI=true, not skipping): %v", err)
		}
		tb.Skipf("pgtest: PostgreSQL unreachable, skipping (set FILTRATE_TEST_POSTGRES): %v", err)
	}
	tb.Cleanup(func() { db.Close() })
	return db
}

// Name returns prefix followed by random hex, for schemas and roles.
func Name(tb testing.TB, prefix string) string {
	tb.Helper()
	var b [6]byte
	if _, err := rand.Read(b[:]); err != nil {
		tb.Fatalf("pgtest: random: %v", err)
	}
	return prefix + hex.EncodeToString(b[:])
}

// FreshSchema is Fresh that also returns the schema's name.
func FreshSchema(tb testing.TB) (dsn, schema string) {
	tb.Helper()
	db := Connect(tb)
	schema = Name(tb, "filtrate_test_")
	ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
	defer cancel()
	if _, err := db.ExecContext(ctx, `CREATE SCHEMA `+schema); err != nil {
		tb.Fatalf("pgtest: create schema: %v", err)
	}
	tb.Cleanup(func() {
		ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
		defer cancel()
		if _, err := db.ExecContext(ctx, `DROP SCHEMA `+schema+` CASCADE`); err != nil {
			tb.Errorf("pgtest: drop schema: %v", err)
		}
	})
	return DSN(tb, "", "", schema), schema
}

// DSN returns the server DSN with search_path set to schema and, when user
// is not empty, logging in as user with password.
func DSN(tb testing.TB, user, password, schema string) string {
	tb.Helper()
	u, err := url.Parse(ServerDSN())
	if err != nil {
		tb.Fatalf("pgtest: parse DSN: %v", err)
	}
	if user != "" {
		u.User = url.UserPassword(user, password)
	}
	q := u.Query()
	if schema != "" {
		q.Set("search_path", schema)
	} else {
		q.Del("search_path")
	}
	u.RawQuery = q.Encode()
	return u.String()
}
