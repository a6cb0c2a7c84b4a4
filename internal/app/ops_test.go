package app

import (
	"bytes"
	"context"
	"database/sql"
	"fmt"
	"log/slog"
	"net/http"
	"net/url"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/stretchr/testify/require"

	"filtrate/config"
	"filtrate/internal/pgtest"
	"filtrate/store"
)

func post(t *testing.T, url, token string) (int, string) {
	t.Helper()
	req, err := http.NewRequest(http.MethodPost, url, nil)
	require.NoError(t, err)
	if token != "" {
		req.Header.Set("Authorization", "Bearer "+token)
	}
	resp, err := http.DefaultClient.Do(req)
	require.NoError(t, err)
	defer resp.Body.Close()
	var b bytes.Buffer
	_, _ = b.ReadFrom(resp.Body)
	return resp.StatusCode, b.String()
}

func startFromFile(t *testing.T, path string, logger *slog.Logger) *running {
	t.Helper()
	a, err := New(context.Background(), Options{ConfigFile: path, Version: "test", Logger: logger, ForwardPoll: 20 * time.Millisecond, WorkerName: t.Name()})
	require.NoError(t, err)
	ctx, cancel := context.WithCancel(context.Background())
	r := &running{app: a, cancel: cancel, done: make(chan error, 1)}
	go func() { r.done <- a.Run(ctx) }()
	t.Cleanup(r.stop)
	return r
}

func TestReloadSwapsOrKeepsConfiguration(t *testing.T) {
	dir := t.TempDir()
	path := filepath.Join(dir, "filtrate.yml")
	base := fmt.Sprintf("store: file:%s\ntimezone: UTC\nhl7v2:\n  listen: 127.0.0.1:0\nhttp:\n  listen: 127.0.0.1:0\n", filepath.Join(dir, "r.db"))
	require.NoError(t, os.WriteFile(path, []byte(base), 0o644))
	r := startFromFile(t, path, nil)
	reload := "http://" + r.app.HTTPAddr() + "/-/reload"
	metrics := "http://" + r.app.HTTPAddr() + "/metrics"
	first := r.app.State().Snapshot.ConfigHash

	// A valid change is swapped in and applies to the next message.
	require.NoError(t, os.WriteFile(path, []byte(base+"policy:\n  preset: nice-2021\n"), 0o644))
	code, body := post(t, reload, "")
	require.Equal(t, http.StatusOK, code, body)
	second := r.app.State().Snapshot.ConfigHash
	require.NotEqual(t, first, second)
	require.Equal(t, "nice-2021", r.app.State().Snapshot.Policy.Name)
	require.Equal(t, "AA", send(t, r.app.HL7Addr(), oru("L1", "P1", "1.0")).Code)
	recs, err := r.app.Store().Search(context.Background(), store.Filter{MessageID: "L1"})
	require.NoError(t, err)
	require.Len(t, recs, 1)
	require.Equal(t, second, recs[0].ConfigHash, "the audit shows which configuration applied")
	require.Equal(t, "ckd-epi-2009-cr", recs[0].Equation)

	// A broken file is refused and the configuration in force is kept.
	require.NoError(t, os.WriteFile(path, []byte(base+"policy:\n  preset: no-such-preset\n"), 0o644))
	code, body = post(t, reload, "")
	require.Equal(t, http.StatusInternalServerError, code)
	require.Contains(t, body, "kept")
	require.Equal(t, second, r.app.State().Snapshot.ConfigHash)
	require.Equal(t, "0", metric(t, get(t, metrics), "filtrate_config_last_reload_successful"))
	require.Equal(t, "AA", send(t, r.app.HL7Addr(), oru("L2", "P1", "1.0")).Code)
	recs, err = r.app.Store().Search(context.Background(), store.Filter{MessageID: "L2"})
	require.NoError(t, err)
	require.Equal(t, "ckd-epi-2009-cr", recs[0].Equation)

	// Fixed again: the metric recovers.
	require.NoError(t, os.WriteFile(path, []byte(base), 0o644))
	code, _ = post(t, reload, "")
	require.Equal(t, http.StatusOK, code)
	require.Equal(t, "1", metric(t, get(t, metrics), "filtrate_config_last_reload_successful"))
	require.Equal(t, first, r.app.State().Snapshot.ConfigHash)
}

func TestUnauthenticatedRequestsAreRefused(t *testing.T) {
	t.Setenv("FILTRATE_TEST_TOKEN", "s3cret-token-for-tests-only")
	dir := t.TempDir()
	path := filepath.Join(dir, "filtrate.yml")
	require.NoError(t, os.WriteFile(path, []byte(fmt.Sprintf(`store: file:%s
hl7v2:
  listen: ""
http:
  listen: 127.0.0.1:0
  auth:
    bearer_token_env: [FILTRATE_TEST_TOKEN]
`, filepath.Join(dir, "a.db"))), 0o644))
	r := startFromFile(t, path, nil)
	base := "http://" + r.app.HTTPAddr()
	for _, tok := range []string{"", "wrong", "s3cret-token-for-tests-only-but-longer"} {
		code, _ := post(t, base+"/-/reload", tok)
		require.Equal(t, http.StatusUnauthorized, code, "token %q", tok)
	}
	code, body := post(t, base+"/-/reload", "s3cret-token-for-tests-only")
	require.Equal(t, http.StatusOK, code, body)
	// Probes and metrics stay open for the orchestrator and Prometheus.
	require.Contains(t, get(t, base+"/healthz"), "ok")
	require.Contains(t, get(t, base+"/metrics"), "filtrate_build_info")
}

// syncBuffer is a bytes.Buffer safe for the logger's concurrent writes.
type syncBuffer struct {
	mu sync.Mutex
	b  bytes.Buffer
}

func (s *syncBuffer) Write(p []byte) (int, error) {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.b.Write(p)
}

func (s *syncBuffer) String() string {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.b.String()
}

// Logs are JSON and never carry patient data, also on failure paths.
func TestNoPatientDataInLogs(t *testing.T) {
	var logs syncBuffer
	logger := slog.New(slog.NewJSONHandler(&logs, &slog.HandlerOptions{Level: slog.LevelDebug}))
	dir := t.TempDir()
	path := filepath.Join(dir, "filtrate.yml")
	downstream := reserve(t) // refuses connections: delivery failures get logged
	require.NoError(t, os.WriteFile(path, []byte(fmt.Sprintf(`store: file:%s
hl7v2:
  listen: 127.0.0.1:0
  forward: %s
  retry: {initial: 10ms, max: 50ms}
http:
  listen: 127.0.0.1:0
`, filepath.Join(dir, "l.db"), downstream)), 0o644))
	r := startFromFile(t, path, logger)

	const secretID, secretName, secretDOB = "SECRETPID4711", "Zanzibarova", "19450607"
	good := strings.NewReplacer("P1^^^LAB", secretID+"^^^LAB", "Test^Patient", secretName+"^Ilse", "19720314", secretDOB).
		Replace(oru("N1", "P1", "1.0"))
	require.Equal(t, "AA", send(t, r.app.HL7Addr(), good).Code)
	// Broken variants: PID with a bad date, a segment name error, a bad frame.
	require.Equal(t, "AA", send(t, r.app.HL7Addr(), strings.Replace(strings.Replace(good, "|N1|", "|N2|", 1), secretDOB, secretDOB+"99x", 1)).Code)
	require.Equal(t, "AR", send(t, r.app.HL7Addr(), "PID|1||"+secretID+"||"+secretName+"\n").Code)
	require.Equal(t, "AR", send(t, r.app.HL7Addr(), strings.Replace(good, "\nPID|", "\nP!D|", 1)).Code)
	require.Eventually(t, func() bool { return strings.Contains(logs.String(), "delivery failed") }, 30*time.Second, 10*time.Millisecond)

	text := logs.String()
	for _, line := range strings.Split(strings.TrimSpace(text), "\n") {
		require.True(t, strings.HasPrefix(line, "{"), "JSON log lines: %q", line)
	}
	for _, secret := range []string{secretID, secretName, secretDOB, "Ilse"} {
		require.NotContains(t, text, secret)
	}
}

// freshDatabase creates a database of its own (so that connections to it can
// be cut) and drops it at the end.
func freshDatabase(t *testing.T) (dsn string, admin *sql.DB, name string) {
	t.Helper()
	admin = pgtest.Connect(t)
	name = pgtest.Name(t, "filtrate_ready_")
	_, err := admin.Exec("CREATE DATABASE " + name)
	require.NoError(t, err)
	t.Cleanup(func() {
		_, _ = admin.Exec("ALTER DATABASE " + name + " ALLOW_CONNECTIONS true")
		_, _ = admin.Exec("SELECT pg_terminate_backend(pid) FROM pg_stat_activity WHERE datname = $1", name)
		_, _ = admin.Exec("DROP DATABASE IF EXISTS " + name)
	})
	u, err := url.Parse(pgtest.ServerDSN())
	require.NoError(t, err)
	u.Path = "/" + name
	return u.String(), admin, name
}

func TestReadyzFollowsTheStore(t *testing.T) {
	dsn, admin, name := freshDatabase(t)
	cfg, err := config.Load([]byte(fmt.Sprintf("store: %q\nhl7v2:\n  listen: 127.0.0.1:0\nhttp:\n  listen: 127.0.0.1:0\n", dsn)), "t.yml")
	require.NoError(t, err)
	a, err := New(context.Background(), Options{Config: cfg, Version: "test"})
	require.NoError(t, err)
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- a.Run(ctx) }()
	defer func() { cancel(); <-done }()
	readyz := "http://" + a.HTTPAddr() + "/readyz"
	status := func() int {
		resp, err := http.Get(readyz)
		require.NoError(t, err)
		resp.Body.Close()
		return resp.StatusCode
	}
	require.Eventually(t, func() bool { return status() == http.StatusOK }, 30*time.Second, 20*time.Millisecond)

	_, err = admin.Exec("ALTER DATABASE " + name + " ALLOW_CONNECTIONS false")
	require.NoError(t, err)
	_, err = admin.Exec("SELECT pg_terminate_backend(pid) FROM pg_stat_activity WHERE datname = $1", name)
	require.NoError(t, err)
	require.Eventually(t, func() bool { return status() == http.StatusServiceUnavailable }, 30*time.Second, 20*time.Millisecond)
	require.Contains(t, get(t, readyz), `"store":"unavailable"`)

	_, err = admin.Exec("ALTER DATABASE " + name + " ALLOW_CONNECTIONS true")
	require.NoError(t, err)
	require.Eventually(t, func() bool { return status() == http.StatusOK }, 30*time.Second, 20*time.Millisecond)
}

// Two daemons sharing one PostgreSQL database share the outbox without
// double sends and write one audit chain.
func TestTwoDaemonsShareOnePostgres(t *testing.T) {
	dsn := pgtest.Fresh(t)
	ds := newDownstream(t, reserve(t))
	start := func(name string) *App {
		cfg, err := config.Load([]byte(fmt.Sprintf(`store: %q
timezone: UTC
hl7v2:
  listen: 127.0.0.1:0
  forward: %s
  retry: {initial: 20ms, max: 200ms}
http:
  listen: 127.0.0.1:0
`, dsn, ds.addr)), "t.yml")
		require.NoError(t, err)
		a, err := New(context.Background(), Options{Config: cfg, Version: "test", WorkerName: name, ForwardPoll: 10 * time.Millisecond})
		require.NoError(t, err)
		ctx, cancel := context.WithCancel(context.Background())
		done := make(chan error, 1)
		go func() { done <- a.Run(ctx) }()
		t.Cleanup(func() { cancel(); <-done })
		return a
	}
	a1, a2 := start("daemon-1"), start("daemon-2")

	const patients, perPatient = 4, 5
	var wg sync.WaitGroup
	for p := range patients {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for i := range perPatient {
				target := a1
				if (p+i)%2 == 1 {
					target = a2
				}
				id := fmt.Sprintf("T%d-%d", p, i)
				if ack := send(t, target.HL7Addr(), oru(id, fmt.Sprintf("P%d", p), "1.0")); ack.Code != "AA" {
					t.Errorf("%s: %s", id, ack.Code)
				}
			}
		}()
	}
	wg.Wait()
	ds.wait(t, patients*perPatient)

	seen := map[string]int{}
	last := map[string]int{}
	for _, m := range ds.messages() {
		var p, i int
		msg := string(m)
		start := strings.Index(msg, "|T") + 2
		_, err := fmt.Sscanf(msg[start:], "%d-%d|", &p, &i)
		require.NoError(t, err)
		key := fmt.Sprintf("T%d-%d", p, i)
		seen[key]++
		prev, ok := last[fmt.Sprint(p)]
		require.True(t, !ok || i > prev, "patient %d: message %d after %d", p, i, prev)
		last[fmt.Sprint(p)] = i
	}
	require.Len(t, seen, patients*perPatient)
	for k, n := range seen {
		require.Equal(t, 1, n, "%s delivered %d times", k, n)
	}

	// One valid chain holds the records of both daemons.
	v := store.NewVerifier()
	n := 0
	require.NoError(t, a1.Store().Walk(context.Background(), 1, func(r store.AuditRecord) error {
		n++
		v.Add(r)
		return nil
	}))
	head, err := a2.Store().Head(context.Background())
	require.NoError(t, err)
	v.CheckHead(head)
	require.True(t, v.OK(), "%v", v.Problems())
	require.Equal(t, patients*perPatient, n)
}

func TestAuditView(t *testing.T) {
	t.Setenv("FILTRATE_TEST_TOKEN", "audit-view-token-for-tests")
	dir := t.TempDir()
	path := filepath.Join(dir, "filtrate.yml")
	require.NoError(t, os.WriteFile(path, []byte(fmt.Sprintf(`store: file:%s
timezone: UTC
hl7v2:
  listen: 127.0.0.1:0
http:
  listen: 127.0.0.1:0
  auth:
    bearer_token_env: [FILTRATE_TEST_TOKEN]
`, filepath.Join(dir, "v.db"))), 0o644))
	r := startFromFile(t, path, nil)
	require.Equal(t, "AA", send(t, r.app.HL7Addr(), oru("V1", "P7", "0.92")).Code)
	base := "http://" + r.app.HTTPAddr()
	getAuth := func(url, token string) (int, string) {
		req, err := http.NewRequest(http.MethodGet, url, nil)
		require.NoError(t, err)
		if token != "" {
			req.Header.Set("Authorization", "Bearer "+token)
		}
		resp, err := http.DefaultClient.Do(req)
		require.NoError(t, err)
		defer resp.Body.Close()
		var b bytes.Buffer
		_, _ = b.ReadFrom(resp.Body)
		return resp.StatusCode, b.String()
	}
	code, _ := getAuth(base+"/audit?patient=P7%5E%5E%5ELAB", "")
	require.Equal(t, http.StatusUnauthorized, code, "the audit view shows patient data: authentication required")
	code, body := getAuth(base+"/audit?patient=P7%5E%5E%5ELAB", "audit-view-token-for-tests")
	require.Equal(t, http.StatusOK, code)
	require.Contains(t, body, `"message_id":"V1"`)
	require.Contains(t, body, `"equation":"ckd-epi-2021-cr"`)
	code, body = getAuth(base+"/audit/1", "audit-view-token-for-tests")
	require.Equal(t, http.StatusOK, code)
	require.Contains(t, body, "Recompute: match")
	code, _ = getAuth(base+"/audit/999", "audit-view-token-for-tests")
	require.Equal(t, http.StatusNotFound, code)
	code, body = getAuth(base+"/audit/export?format=csv", "audit-view-token-for-tests")
	require.Equal(t, http.StatusOK, code)
	require.Contains(t, body, "V1")
	code, _ = getAuth(base+"/audit?since=yesterday", "audit-view-token-for-tests")
	require.Equal(t, http.StatusBadRequest, code)
}

func TestRunAfterShutdownReturns(t *testing.T) {
	cfg, err := config.Load([]byte(fmt.Sprintf("store: file:%s\nhl7v2:\n  listen: 127.0.0.1:0\nhttp:\n  listen: 127.0.0.1:0\n", filepath.Join(t.TempDir(), "x.db"))), "t.yml")
	require.NoError(t, err)
	a, err := New(context.Background(), Options{Config: cfg})
	require.NoError(t, err)
	require.NoError(t, a.Shutdown(context.Background()))
	require.ErrorContains(t, a.Run(context.Background()), "already shut down")
}

func TestRestartKeys(t *testing.T) {
	old := config.Default()
	cur := config.Default()
	require.Empty(t, restartKeys(old, cur))
	cur.HL7v2.Forward = "127.0.0.1:9"
	cur.HL7v2.AckTimeout = 5 * time.Second
	cur.PolicyConfig.Preset = "ekfc" // applies at once: not listed
	require.Equal(t, []string{"hl7v2.forward", "hl7v2 limits and time-outs"}, restartKeys(old, cur))
}
