package store_test

import (
	"database/sql"
	"errors"
	"os"
	"regexp"
	"strings"
	"testing"
	"time"

	"github.com/lib/pq"
	"github.com/stretchr/testify/require"

	"filtrate/internal/pgtest"
	"filtrate/store"
)

// sqlBlocks returns the ```sql blocks of a Markdown file.
func sqlBlocks(t *testing.T, path string) []string {
	t.Helper()
	doc, err := os.ReadFile(path)
	require.NoError(t, err)
	var blocks []string
	for _, part := range strings.Split(string(doc), "```sql\n")[1:] {
		block, _, found := strings.Cut(part, "```")
		require.True(t, found, "unterminated sql block in %s", path)
		blocks = append(blocks, block)
	}
	return blocks
}

// TestRestrictedRole runs the SQL of ROLES.md with fresh names and checks
// that the daemon role can do its work and cannot rewrite audit data.
func TestRestrictedRole(t *testing.T) {
	admin := pgtest.Connect(t)
	ctx := t.Context()
	schema := pgtest.Name(t, "ft_schema_")
	owner := pgtest.Name(t, "ft_owner_")
	daemon := pgtest.Name(t, "ft_daemon_")
	rename := func(sqlText string) string {
		sqlText = regexp.MustCompile(`\bfiltrate_owner\b`).ReplaceAllString(sqlText, owner)
		sqlText = regexp.MustCompile(`\bfiltrate_daemon\b`).ReplaceAllString(sqlText, daemon)
		return regexp.MustCompile(`\bfiltrate\b`).ReplaceAllString(sqlText, schema)
	}
	blocks := sqlBlocks(t, "ROLES.md")
	require.Len(t, blocks, 2, "ROLES.md: role setup, then grants")

	t.Cleanup(func() {
		for _, q := range []string{
			`DROP SCHEMA IF EXISTS ` + schema + ` CASCADE`,
			`DROP OWNED BY ` + daemon,
			`DROP OWNED BY ` + owner,
			`DROP ROLE IF EXISTS ` + daemon,
			`DROP ROLE IF EXISTS ` + owner,
		} {
			if _, err := admin.Exec(q); err != nil {
				t.Errorf("cleanup %q: %v", q, err)
			}
		}
	})
	_, err := admin.ExecContext(ctx, rename(blocks[0]))
	require.NoError(t, err)

	applied, err := store.Migrate(ctx, pgtest.DSN(t, owner, "change-me-owner", schema))
	require.NoError(t, err)
	require.NotEmpty(t, applied)
	_, err = admin.ExecContext(ctx, rename(blocks[1]))
	require.NoError(t, err)

	// The daemon relies on the role's search_path (ALTER ROLE ... SET).
	daemonDSN := pgtest.DSN(t, daemon, "change-me-daemon", "")
	clk := storeClock()
	st, err := store.Open(ctx, daemonDSN, store.WithClock(clk.now))
	require.NoError(t, err, "a current schema needs no DDL rights")
	require.NoError(t, st.Close())
	st, err = store.Open(ctx, daemonDSN, store.WithClock(clk.now), store.WithoutMigrations())
	require.NoError(t, err)
	t.Cleanup(func() { st.Close() })
	require.NoError(t, st.Ready(ctx))

	rc, err := st.Accept(ctx, store.Submission{
		DedupKey: "role-1",
		Records:  []store.AuditRecord{benchRecord("role-1"), benchRecord("role-1b")},
		Outbox: []store.OutboxMessage{
			{Destination: "lis", PartitionKey: "P", Payload: []byte("one")},
			{Destination: "lis", PartitionKey: "Q", Payload: []byte("two")},
		},
		History:  []store.HistoryPoint{{PatientID: "DEMO-R", Analyte: "creatinine", Value: 90, CollectedAt: clk.now()}},
		Reported: []store.Reported{{Key: "g|cr", GroupKey: "g", Equation: "ckd-epi-2021-cr", Active: true}},
	})
	require.NoError(t, err)
	_, err = st.Accept(ctx, store.Submission{DedupKey: "role-2",
		Reported: []store.Reported{{Key: "g|cr", GroupKey: "g", Equation: "ckd-epi-2021-cr", Active: false}}})
	require.NoError(t, err, "the daemon role updates the state of a reported observation")
	items, err := st.Claim(ctx, "lis", "w", 10, time.Minute)
	require.NoError(t, err)
	require.Len(t, items, 2)
	require.NoError(t, st.MarkSent(ctx, rc.OutboxIDs[0], "AA"))
	require.NoError(t, st.Retry(ctx, rc.OutboxIDs[1], clk.now(), "AE"))
	require.NoError(t, st.Park(ctx, rc.OutboxIDs[1], "AR"))
	require.NoError(t, st.Requeue(ctx, rc.OutboxIDs[1]))
	_, err = st.OutboxStats(ctx)
	require.NoError(t, err)
	n, err := st.PurgeSent(ctx, clk.now().Add(time.Hour))
	require.NoError(t, err)
	require.EqualValues(t, 1, n)
	_, err = st.History(ctx, "DEMO-R", "creatinine", time.Time{})
	require.NoError(t, err)
	_, err = st.Search(ctx, store.Filter{PatientID: "DEMO-BENCH-role-1"})
	require.NoError(t, err)
	v := store.NewVerifier()
	require.NoError(t, st.Walk(ctx, 1, func(r store.AuditRecord) error { v.Add(r); return nil }))
	require.True(t, v.OK())
	require.EqualValues(t, 2, v.Checked())

	raw, err := sql.Open("postgres", daemonDSN)
	require.NoError(t, err)
	t.Cleanup(func() { raw.Close() })
	for _, q := range []string{
		`UPDATE audit_records SET reported = '1'`,
		`DELETE FROM audit_records`,
		`TRUNCATE audit_records`,
		`UPDATE submissions SET accepted_at = now()`,
		`DELETE FROM submissions`,
		`DELETE FROM history_points`,
		`UPDATE outbox_items SET payload = 'forged'`,
		`UPDATE outbox_items SET destination = 'elsewhere'`,
		`CREATE TABLE ` + schema + `.intruder (x int)`,
		`DROP TABLE audit_records`,
		`ALTER TABLE audit_records DISABLE TRIGGER ALL`,
		`DROP TRIGGER audit_records_append_only ON audit_records`,
	} {
		_, err := raw.ExecContext(ctx, q)
		var pe *pq.Error
		require.True(t, errors.As(err, &pe), "%s: want a refusal, got %v", q, err)
		require.Contains(t, []pq.ErrorCode{"42501"}, pe.Code, "%s: want insufficient_privilege, got %v", q, err)
	}
}

// fixedClock is a fixed clock for tests outside the shared suite.
type fixedClock struct{ t time.Time }

func (c fixedClock) now() time.Time { return c.t }

func storeClock() fixedClock {
	return fixedClock{t: time.Date(2025, 4, 1, 12, 0, 0, 0, time.UTC)}
}
