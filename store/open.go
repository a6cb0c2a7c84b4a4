package store

import (
	"context"
	"database/sql"
	"embed"
	"errors"
	"fmt"
	"hash/fnv"
	"io/fs"
	"net/url"
	"strings"

	_ "github.com/lib/pq" // PostgreSQL driver "postgres"
	"github.com/pressly/goose/v3"
	"github.com/pressly/goose/v3/lock"
	_ "modernc.org/sqlite" // SQLite driver "sqlite"
)

//go:embed migrations/sqlite/*.sql migrations/postgres/*.sql
var migrationFiles embed.FS

type backendKind int

const (
	backendSQLite backendKind = iota + 1
	backendPostgres
)

// target is a parsed DSN.
type target struct {
	kind backendKind
	// path and params hold the SQLite file and the caller's URI
	// parameters; url holds the PostgreSQL URL.
	path   string
	params url.Values
	url    string
}

// parseDSN picks the backend from the DSN. Errors never repeat the DSN,
// which may hold a password.
func parseDSN(dsn string) (target, error) {
	switch {
	case strings.HasPrefix(dsn, "file:"):
		rest := strings.TrimPrefix(dsn, "file:")
		path, rawQuery, _ := strings.Cut(rest, "?")
		if path == "" {
			return target{}, fmt.Errorf("%w: file: needs a path", ErrUnsupportedDSN)
		}
		params, err := url.ParseQuery(rawQuery)
		if err != nil {
			return target{}, fmt.Errorf("%w: file: parameters do not parse", ErrUnsupportedDSN)
		}
		if path == ":memory:" || params.Get("mode") == "memory" {
			// Two connection pools (writer and readers) must see one database.
			return target{}, fmt.Errorf("%w: in-memory SQLite is not supported, give a file path", ErrUnsupportedDSN)
		}
		return target{kind: backendSQLite, path: path, params: params}, nil
	case strings.HasPrefix(dsn, "postgres://"), strings.HasPrefix(dsn, "postgresql://"):
		// Parse here so that the driver never reports a malformed URL,
		// password included, in its error.
		if _, err := url.Parse(dsn); err != nil {
			var ue *url.Error
			if errors.As(err, &ue) {
				err = ue.Err
			}
			return target{}, fmt.Errorf("%w: postgres URL does not parse: %v", ErrUnsupportedDSN, err)
		}
		return target{kind: backendPostgres, url: dsn}, nil
	}
	scheme, _, found := strings.Cut(dsn, ":")
	if found && scheme != "" && len(scheme) <= 16 && !strings.ContainsAny(scheme, "/@ ") {
		return target{}, fmt.Errorf("%w: unknown scheme %q", ErrUnsupportedDSN, scheme)
	}
	return target{}, ErrUnsupportedDSN
}

// sqliteDSN returns the driver DSN for a writer or a reader pool.
func (t target) sqliteDSN(writer bool) string {
	q := url.Values{}
	for k, v := range t.params {
		q[k] = append([]string(nil), v...)
	}
	setDefault := func(k, v string) {
		if q.Get(k) == "" {
			q.Set(k, v)
		}
	}
	setDefault("_busy_timeout", "10000")
	q.Set("_foreign_keys", "1")
	if writer {
		q.Set("_journal_mode", "WAL")
		// FULL: a commit is on disk before Accept returns, even in WAL mode.
		q.Set("_synchronous", "FULL")
		// Every write transaction takes the write lock up front, so the
		// chain head cannot be read by two writers at once.
		q.Set("_txlock", "immediate")
	} else {
		q.Set("_query_only", "1")
	}
	return "file:" + t.path + "?" + q.Encode()
}

// Open connects to the database named by dsn ("file:PATH" for the embedded
// SQLite store, "postgres://..." or "postgresql://..." for PostgreSQL),
// applies pending schema migrations (unless WithoutMigrations) and returns a
// ready Store. Close it when done.
func Open(ctx context.Context, dsn string, opts ...Option) (Store, error) {
	o := defaultOptions()
	for _, opt := range opts {
		opt(&o)
	}
	t, err := parseDSN(dsn)
	if err != nil {
		return nil, err
	}
	var s *sqlStore
	switch t.kind {
	case backendSQLite:
		s, err = openSQLite(ctx, t, o)
	case backendPostgres:
		s, err = openPostgres(ctx, t, o)
	}
	if err != nil {
		return nil, err
	}
	s.start()
	return s, nil
}

func openSQLite(ctx context.Context, t target, o options) (*sqlStore, error) {
	w, err := sql.Open("sqlite", t.sqliteDSN(true))
	if err != nil {
		return nil, fmt.Errorf("store: open sqlite: %w", err)
	}
	// One writer connection: writes of this process queue in Go instead of
	// spinning on SQLite's busy handler; other processes wait on
	// busy_timeout.
	w.SetMaxOpenConns(1)
	w.SetMaxIdleConns(1)
	w.SetConnMaxIdleTime(0)
	if err := w.PingContext(ctx); err != nil {
		w.Close()
		return nil, dbErr("open sqlite", err)
	}
	prov, err := newProvider(ctx, sqliteDialect, w, o)
	if err != nil {
		w.Close()
		return nil, err
	}
	if err := prepareSchema(ctx, prov, o); err != nil {
		w.Close()
		return nil, err
	}
	r, err := sql.Open("sqlite", t.sqliteDSN(false))
	if err != nil {
		w.Close()
		return nil, fmt.Errorf("store: open sqlite: %w", err)
	}
	r.SetMaxOpenConns(4)
	r.SetMaxIdleConns(4)
	if err := r.PingContext(ctx); err != nil {
		w.Close()
		r.Close()
		return nil, dbErr("open sqlite", err)
	}
	return newSQLStore(sqliteDialect, w, r, prov, o), nil
}

func openPostgres(ctx context.Context, t target, o options) (*sqlStore, error) {
	db, err := sql.Open("postgres", t.url)
	if err != nil {
		// lib/pq reports DSN syntax errors here; they may quote the DSN.
		return nil, fmt.Errorf("%w: postgres URL does not parse", ErrUnsupportedDSN)
	}
	db.SetMaxOpenConns(o.maxConns)
	db.SetMaxIdleConns(o.maxConns)
	if err := db.PingContext(ctx); err != nil {
		db.Close()
		return nil, dbErr("connect postgres", err)
	}
	prov, err := newProvider(ctx, postgresDialect, db, o)
	if err != nil {
		db.Close()
		return nil, err
	}
	if err := prepareSchema(ctx, prov, o); err != nil {
		db.Close()
		return nil, err
	}
	return newSQLStore(postgresDialect, db, db, prov, o), nil
}

func prepareSchema(ctx context.Context, prov *goose.Provider, o options) error {
	if o.skipMigrations {
		pending, err := prov.HasPending(ctx)
		if err != nil {
			return fmt.Errorf("store: check migrations: %w", err)
		}
		if pending {
			return ErrMigrationsPending
		}
		return nil
	}
	if _, err := prov.Up(ctx); err != nil {
		return fmt.Errorf("store: migrate: %w", err)
	}
	return nil
}

// newProvider returns a goose provider for the dialect's embedded
// migrations. On PostgreSQL, migrations take a session advisory lock scoped
// to the database and schema, so daemons starting together migrate once.
func newProvider(ctx context.Context, d *dialect, db *sql.DB, o options) (*goose.Provider, error) {
	fsys, err := fs.Sub(migrationFiles, "migrations/"+d.name)
	if err != nil {
		return nil, fmt.Errorf("store: migrations: %w", err)
	}
	popts := []goose.ProviderOption{
		goose.WithDisableGlobalRegistry(true),
		goose.WithSlog(o.logger),
	}
	if d.postgres {
		var where string
		if err := db.QueryRowContext(ctx, `SELECT current_database() || '.' || coalesce(current_schema(), '')`).Scan(&where); err != nil {
			return nil, dbErr("migrations", err)
		}
		h := fnv.New64a()
		h.Write([]byte("filtrate.store.migrate." + where))
		locker, err := lock.NewPostgresSessionLocker(
			lock.WithLockID(int64(h.Sum64()>>1)),
			lock.WithLockTimeout(1, 600),
		)
		if err != nil {
			return nil, fmt.Errorf("store: migrations lock: %w", err)
		}
		popts = append(popts, goose.WithSessionLocker(locker))
	}
	p, err := goose.NewProvider(d.goose, db, fsys, popts...)
	if err != nil {
		return nil, fmt.Errorf("store: migrations: %w", err)
	}
	return p, nil
}

// Migrate applies the pending schema migrations to the database named by
// dsn and returns the versions it applied (none when the schema was
// current). It serves the "filtrate store migrate" command; Open migrates
// too, unless told WithoutMigrations.
func Migrate(ctx context.Context, dsn string, opts ...Option) ([]int64, error) {
	o := defaultOptions()
	for _, opt := range opts {
		opt(&o)
	}
	t, err := parseDSN(dsn)
	if err != nil {
		return nil, err
	}
	var (
		db *sql.DB
		d  *dialect
	)
	switch t.kind {
	case backendSQLite:
		d = sqliteDialect
		db, err = sql.Open("sqlite", t.sqliteDSN(true))
		if err == nil {
			db.SetMaxOpenConns(1)
		}
	case backendPostgres:
		d = postgresDialect
		db, err = sql.Open("postgres", t.url)
	}
	if err != nil {
		return nil, fmt.Errorf("%w: open failed", ErrUnsupportedDSN)
	}
	defer db.Close()
	if err := db.PingContext(ctx); err != nil {
		return nil, dbErr("connect", err)
	}
	prov, err := newProvider(ctx, d, db, o)
	if err != nil {
		return nil, err
	}
	res, err := prov.Up(ctx)
	if err != nil {
		return nil, fmt.Errorf("store: migrate: %w", err)
	}
	applied := make([]int64, 0, len(res))
	for _, r := range res {
		applied = append(applied, r.Source.Version)
	}
	return applied, nil
}

// ready reports ErrMigrationsPending when the schema is behind.
func ready(ctx context.Context, prov *goose.Provider) error {
	pending, err := prov.HasPending(ctx)
	if err != nil {
		return fmt.Errorf("store: check migrations: %w", err)
	}
	if pending {
		return ErrMigrationsPending
	}
	return nil
}

func isNoRows(err error) bool { return errors.Is(err, sql.ErrNoRows) }
