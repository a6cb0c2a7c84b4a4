package store_test

import (
	"database/sql"
	"testing"

	"github.com/stretchr/testify/require"

	"filtrate/internal/pgtest"
	"filtrate/store/storetest"
)

// postgresBackend runs the suite in a fresh schema per test on the server
// named by FILTRATE_TEST_POSTGRES (see package pgtest).
var postgresBackend = storetest.Backend{
	NewDSN: func(t *testing.T) string { return pgtest.Fresh(t) },
	Driver: "postgres",
	DisableAppendOnly: func(t *testing.T, db *sql.DB) {
		// As superuser: the owner of the data can always do this, which is
		// why the chain, not the trigger, is the evidence.
		_, err := db.ExecContext(t.Context(), `ALTER TABLE audit_records DISABLE TRIGGER ALL`)
		require.NoError(t, err)
	},
	HasTruncate: true,
}

func TestPostgres(t *testing.T) {
	storetest.Run(t, postgresBackend)
}
