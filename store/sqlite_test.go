package store_test

import (
	"database/sql"
	"path/filepath"
	"testing"

	"github.com/stretchr/testify/require"

	"filtrate/store/storetest"
)

// sqliteBackend runs the suite on database files in the test's temporary
// directory.
var sqliteBackend = storetest.Backend{
	NewDSN: func(t *testing.T) string {
		return "file:" + filepath.Join(t.TempDir(), "filtrate.db")
	},
	Driver: "sqlite",
	DisableAppendOnly: func(t *testing.T, db *sql.DB) {
		for _, q := range []string{
			`DROP TRIGGER audit_records_no_update`,
			`DROP TRIGGER audit_records_no_delete`,
		} {
			_, err := db.ExecContext(t.Context(), q)
			require.NoError(t, err)
		}
	},
}

func TestSQLite(t *testing.T) {
	storetest.Run(t, sqliteBackend)
}
