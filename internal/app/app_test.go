package app

import (
	"context"
	"fmt"
	"io"
	"net"
	"net/http"
	"path/filepath"
	"regexp"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/stretchr/testify/require"

	"filtrate/config"
	"filtrate/hl7v2"
	"filtrate/hl7v2/mllp"
)

// downstream is a fake receiving system: an MLLP server on 127.0.0.1 that
// records every message and answers with the configured code.
type downstream struct {
	mu       sync.Mutex
	received [][]byte
	answer   string // AA, AE or AR
	got      chan struct{}
	srv      *mllp.Server
	addr     string
}

func newDownstream(t *testing.T, addr string) *downstream {
	t.Helper()
	d := &downstream{answer: "AA", got: make(chan struct{}, 100), addr: addr}
	if addr != "" {
		d.start(t)
	}
	return d
}

// reserve returns a free loopback address nobody listens on yet.
func reserve(t *testing.T) string {
	t.Helper()
	l, err := net.Listen("tcp", "127.0.0.1:0")
	require.NoError(t, err)
	addr := l.Addr().String()
	require.NoError(t, l.Close())
	return addr
}

func (d *downstream) start(t *testing.T) {
	t.Helper()
	l, err := net.Listen("tcp", d.addr)
	require.NoError(t, err)
	d.srv = &mllp.Server{Handler: mllp.HandlerFunc(func(_ context.Context, p []byte) []byte {
		msg, err := hl7v2.Parse(p)
		if err != nil {
			return nil
		}
		d.mu.Lock()
		code := d.answer
		if code == "AA" {
			d.received = append(d.received, append([]byte(nil), p...))
		}
		d.mu.Unlock()
		if code == "AA" {
			d.got <- struct{}{}
		}
		return hl7v2.BuildACK(msg, code, "", "", "DS1", time.Now()).Encode()
	})}
	go func() { _ = d.srv.Serve(l) }()
	t.Cleanup(func() { _ = d.srv.Close() })
}

func (d *downstream) setAnswer(code string) {
	d.mu.Lock()
	d.answer = code
	d.mu.Unlock()
}

func (d *downstream) messages() [][]byte {
	d.mu.Lock()
	defer d.mu.Unlock()
	return append([][]byte(nil), d.received...)
}

// wait blocks until n more messages have been received.
func (d *downstream) wait(t *testing.T, n int) {
	t.Helper()
	for range n {
		select {
		case <-d.got:
		case <-time.After(30 * time.Second): // a generous bound on a hang, not a speed assertion
			t.Fatalf("downstream did not receive the expected message; has %d", len(d.messages()))
		}
	}
}

type running struct {
	app    *App
	cancel context.CancelFunc
	done   chan error
}

func startApp(t *testing.T, dbPath, forward string) *running {
	t.Helper()
	yml := fmt.Sprintf(`
store: file:%s
timezone: UTC
hl7v2:
  listen: 127.0.0.1:0
  forward: %q
  ack_timeout: 2s
  retry: {initial: 20ms, max: 200ms}
http:
  listen: 127.0.0.1:0
`, dbPath, forward)
	cfg, err := config.Load([]byte(yml), "test.yml")
	require.NoError(t, err)
	a, err := New(context.Background(), Options{Config: cfg, Version: "test", ForwardPoll: 20 * time.Millisecond, WorkerName: t.Name()})
	require.NoError(t, err)
	ctx, cancel := context.WithCancel(context.Background())
	r := &running{app: a, cancel: cancel, done: make(chan error, 1)}
	go func() { r.done <- a.Run(ctx) }()
	t.Cleanup(r.stop)
	return r
}

func (r *running) stop() {
	r.cancel()
	<-r.done
	r.done <- nil // later stops return at once
}

func send(t *testing.T, addr, msg string) hl7v2.Ack {
	t.Helper()
	c, err := mllp.Dial(context.Background(), addr, mllp.ClientOptions{})
	require.NoError(t, err)
	defer c.Close()
	raw, err := c.Send(context.Background(), []byte(strings.ReplaceAll(msg, "\n", "\r")))
	require.NoError(t, err)
	ack, err := hl7v2.ParseACK(raw)
	require.NoError(t, err)
	return ack
}

func oru(controlID, patient, creatinine string) string {
	return fmt.Sprintf(`MSH|^~\&|LIS|LAB|EHR|HOSP|20261130081500||ORU^R01^ORU_R01|%s|P|2.5.1
PID|1||%s^^^LAB^MR||Test^Patient||19720314|F
OBR|1|O1|F1|RENAL^Renal^L|||20261130071000
OBX|1|NM|2160-0^Creatinine^LN||%s|mg/dL|||||F|||20261130071000
ZXT|1|site specific|kept
`, controlID, patient, creatinine)
}

func TestHL7EndToEnd(t *testing.T) {
	ds := newDownstream(t, reserve(t))
	r := startApp(t, filepath.Join(t.TempDir(), "e2e.db"), ds.addr)
	addr := r.app.HL7Addr()

	ack := send(t, addr, oru("E1", "P1", "0.92"))
	require.Equal(t, "AA", ack.Code)
	require.Equal(t, "E1", ack.ControlID)
	ds.wait(t, 1)
	fwd := string(ds.messages()[0])
	require.Contains(t, fwd, "|98979-8^", "the eGFR OBX is added")
	// CKD-EPI 2021 (Inker, N Engl J Med 2021), woman of 54 with 0.92 mg/dL,
	// hand computation: 142 × (0.92/0.7)^−1.200 × 0.9938^54 × 1.012 = 74.0.
	require.Contains(t, fwd, "|ckd-epi-2021-cr|74|mL/min/{1.73_m2}^^UCUM|", "OBX-4 names the equation")
	require.Contains(t, fwd, "\rZXT|1|site specific|kept\r", "Z-segments pass unchanged")
	require.True(t, strings.HasPrefix(fwd, "MSH|^~\\&|LIS|LAB|EHR|HOSP|20261130081500||ORU^R01^ORU_R01|E1|"), "the original MSH is kept")

	// A duplicate is acknowledged again but not forwarded again: the next
	// message of the same patient (delivered in order) arrives next.
	require.Equal(t, "AA", send(t, addr, oru("E1", "P1", "0.92")).Code)
	require.Equal(t, "AA", send(t, addr, oru("E2", "P1", "1.30")).Code)
	ds.wait(t, 1)
	msgs := ds.messages()
	require.Len(t, msgs, 2)
	require.Contains(t, string(msgs[1]), "|E2|")

	// Bad frames are refused, and the daemon carries on.
	require.Equal(t, "AR", send(t, addr, "PID|1||P9\n").Code)
	require.Equal(t, "AR", send(t, addr, strings.Replace(oru("E3", "P1", "1"), "ORU^R01^ORU_R01", "ADT^A01^ADT_A01", 1)).Code)
	big := oru("E4", "P1", "1") + "NTE|1|L|" + strings.Repeat("x", 2<<20) + "\n"
	require.Equal(t, "AR", send(t, addr, big).Code, "an oversized frame gets AR")
	require.Equal(t, "AA", send(t, addr, oru("E5", "P2", "1.0")).Code)
	ds.wait(t, 1)

	// Metrics moved. (The downstream system has the message slightly
	// before the daemon records its ACK, hence Eventually.)
	metricsURL := "http://" + r.app.HTTPAddr() + "/metrics"
	require.Eventually(t, func() bool {
		return metric(t, get(t, metricsURL), `filtrate_outbox_pending{destination="hl7v2"}`) == "0"
	}, 30*time.Second, 10*time.Millisecond)
	body := get(t, metricsURL)
	require.Equal(t, "4", metric(t, body, `filtrate_ingest_messages_acknowledged_total{code="AA",transport="hl7v2"}`))
	require.Equal(t, "3", metric(t, body, `filtrate_ingest_messages_acknowledged_total{code="AR",transport="hl7v2"}`))
	require.Equal(t, "3", metric(t, body, `filtrate_calc_results_total{equation="ckd-epi-2021-cr"}`))
	require.Equal(t, "3", metric(t, body, `filtrate_forward_attempts_total{destination="hl7v2",outcome="sent"}`))
	require.Contains(t, get(t, "http://"+r.app.HTTPAddr()+"/healthz"), "ok")
	require.Contains(t, get(t, "http://"+r.app.HTTPAddr()+"/readyz"), `"store":"ok"`)
}

// metric returns the value of one series in a Prometheus text exposition.
func metric(t *testing.T, body, series string) string {
	t.Helper()
	for _, line := range strings.Split(body, "\n") {
		if v, ok := strings.CutPrefix(line, series+" "); ok {
			return v
		}
	}
	t.Fatalf("series %s not exposed", series)
	return ""
}

func get(t *testing.T, url string) string {
	t.Helper()
	resp, err := http.Get(url)
	require.NoError(t, err)
	defer resp.Body.Close()
	b, err := io.ReadAll(resp.Body)
	require.NoError(t, err)
	return string(b)
}

// Messages accepted while the downstream system refuses connections, and
// across a restart of the daemon, are delivered exactly once when it
// comes back.
func TestForwardingSurvivesDownstreamOutageAndRestart(t *testing.T) {
	db := filepath.Join(t.TempDir(), "restart.db")
	addr := reserve(t) // nobody listens: connections are refused
	ds := newDownstream(t, "")
	ds.addr = addr

	r := startApp(t, db, addr)
	for i := range 3 {
		require.Equal(t, "AA", send(t, r.app.HL7Addr(), oru(fmt.Sprintf("R%d", i), "P1", "1.0")).Code)
	}
	// Wait until the worker has failed at least once, then stop the daemon.
	retries := regexp.MustCompile(`filtrate_forward_attempts_total\{destination="hl7v2",outcome="retry"\} (\d+)`)
	require.Eventually(t, func() bool {
		m := retries.FindStringSubmatch(get(t, "http://"+r.app.HTTPAddr()+"/metrics"))
		return m != nil && m[1] != "0"
	}, 30*time.Second, 20*time.Millisecond)
	r.stop()

	// Restart on the same store, with the downstream system back.
	ds.start(t)
	r2 := startApp(t, db, addr)
	ds.wait(t, 3)
	// One more message proves the queue is drained in order and nothing
	// is sent twice.
	require.Equal(t, "AA", send(t, r2.app.HL7Addr(), oru("R9", "P1", "1.0")).Code)
	ds.wait(t, 1)
	msgs := ds.messages()
	require.Len(t, msgs, 4)
	for i, want := range []string{"|R0|", "|R1|", "|R2|", "|R9|"} {
		require.Contains(t, string(msgs[i]), want, "per-patient order")
	}
}

// A message the downstream system rejects (AR) is parked for a person.
// The same patient's later reports wait behind it (so that a correction
// is never overtaken by its original); other patients' reports flow.
func TestRejectedMessageIsParked(t *testing.T) {
	ds := newDownstream(t, reserve(t))
	ds.setAnswer("AR")
	r := startApp(t, filepath.Join(t.TempDir(), "park.db"), ds.addr)
	require.Equal(t, "AA", send(t, r.app.HL7Addr(), oru("K1", "P1", "1.0")).Code)
	require.Eventually(t, func() bool {
		parked, err := r.app.Store().ListParked(context.Background())
		return err == nil && len(parked) == 1
	}, 30*time.Second, 20*time.Millisecond)
	require.Equal(t, "1", metric(t, get(t, "http://"+r.app.HTTPAddr()+"/metrics"), `filtrate_outbox_parked{destination="hl7v2"}`))

	ds.setAnswer("AA")
	require.Equal(t, "AA", send(t, r.app.HL7Addr(), oru("K2", "P1", "1.0")).Code)
	require.Equal(t, "AA", send(t, r.app.HL7Addr(), oru("K3", "P2", "1.0")).Code)
	ds.wait(t, 1)
	require.Contains(t, string(ds.messages()[0]), "|K3|", "another patient is not held up")

	// A person decides K1 must not be sent: P1's K2 follows.
	parked, err := r.app.Store().ListParked(context.Background())
	require.NoError(t, err)
	require.NoError(t, r.app.Store().Discard(context.Background(), parked[0].ID, "sent by hand after checking"))
	ds.wait(t, 1)
	msgs := ds.messages()
	require.Len(t, msgs, 2)
	require.Contains(t, string(msgs[1]), "|K2|")
}

func TestShutdownIsIdempotent(t *testing.T) {
	r := startApp(t, filepath.Join(t.TempDir(), "s.db"), "")
	r.stop()
	require.NoError(t, r.app.Shutdown(context.Background()))
}
