package main

import (
	"context"
	"net"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/stretchr/testify/require"

	"filtrate/hl7v2"
	"filtrate/hl7v2/mllp"
	"filtrate/store"
)

const demoDir = "../../testdata/demo"

func TestDemo(t *testing.T) {
	out, _, err := runCLI(t, "", "demo", "--scenario", demoDir)
	require.NoError(t, err)
	require.Contains(t, out, "Report NVL000101: acknowledged AA, forwarded")
	// CKD-EPI 2021 for the invented 54-year-old woman with 0.92 mg/dL; the
	// value is checked by hand in testdata/demo/expected (see ingest tests).
	require.Contains(t, out, "=> eGFR 74 mL/min/{1.73_m2} by CKD-EPI 2021 creatinine (LOINC 98979-8, status F)")
	require.Contains(t, out, "note: eGFR not calculated: height is required for this age and was not provided.")
	require.Contains(t, out, "hash chain verified")
	require.Contains(t, out, "The HL7 v2 downstream receiver got 9 reports, each once.")
	// The FHIR request of the scenario goes to the same daemon: CKD-EPI
	// 2021 for the invented 38-year-old man with 1.05 mg/dL gives 93
	// (hand computation: 142 × (1.05/0.9)^−1.200 × 0.9938^38 = 93.2).
	require.Contains(t, out, "FHIR request 10-fhir-creatinine-cystatin.json: HTTP 200")
	require.Contains(t, out, "=> eGFR (CKD-EPI 2021 creatinine) 93 mL/min/{1.73_m2} (LOINC 98979-8, status final)")
	require.Contains(t, out, "licensed clinicians decide")
}

func TestDemoNeedsScenario(t *testing.T) {
	_, _, err := runCLI(t, "", "demo", "--scenario", t.TempDir())
	require.ErrorContains(t, err, "--scenario")
}

func TestDryrun(t *testing.T) {
	out, _, err := runCLI(t, "", "dryrun", "--config", filepath.Join(demoDir, "filtrate.yml"), filepath.Join(demoDir, "01-adult-female-creatinine.hl7"))
	require.NoError(t, err)
	want, err := os.ReadFile(filepath.Join(demoDir, "expected", "01-adult-female-creatinine.forwarded.hl7"))
	require.NoError(t, err)
	require.Contains(t, out, "ACK AA")
	require.Contains(t, out, string(want), "dryrun prints exactly what serve would forward")

	out, _, err = runCLI(t, "", "dryrun", "--diff", "--config", filepath.Join(demoDir, "filtrate.yml"), filepath.Join(demoDir, "03-adult-creatinine-cystatin.hl7"))
	require.NoError(t, err)
	require.NotContains(t, out, "+ MSH", "unchanged segments are not shown")
	require.Contains(t, out, "+ OBX|2|NM|98979-8^")
	require.Contains(t, out, "~ OBX|3|NM|33863-2^", "the renumbered cystatin C OBX is shown as changed")
	require.Contains(t, out, "+ OBX|5|NM|98980-6^")

	// A refused message makes dryrun exit non-zero, after printing why.
	out, _, err = runCLI(t, "PID|1||X\n", "dryrun", "-")
	var ec exitCode
	require.ErrorAs(t, err, &ec)
	require.Contains(t, out, "ACK AR")
}

func TestConfigCheck(t *testing.T) {
	out, _, err := runCLI(t, "", "config", "check", filepath.Join(demoDir, "filtrate.yml"))
	require.NoError(t, err)
	require.Contains(t, out, ": ok (configuration hash ")

	bad := filepath.Join(t.TempDir(), "bad.yml")
	require.NoError(t, os.WriteFile(bad, []byte("hl7v2:\n  lisen: x\npolicy:\n  preset: nope\n"), 0o644))
	out, _, err = runCLI(t, "", "config", "check", bad)
	var ec exitCode
	require.ErrorAs(t, err, &ec)
	require.Contains(t, out, bad+":2: hl7v2.lisen: unknown key")
	require.Contains(t, out, bad+":4: policy.preset: unknown preset")
	require.Contains(t, out, "2 problem(s)")
}

func TestSend(t *testing.T) {
	// A fake peer that accepts the first message and rejects the second.
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	require.NoError(t, err)
	n := 0
	srv := &mllp.Server{Handler: mllp.HandlerFunc(func(_ context.Context, p []byte) []byte {
		m, err := hl7v2.Parse(p)
		require.NoError(t, err)
		n++
		code := "AA"
		if n == 2 {
			code = "AR"
		}
		return hl7v2.BuildACK(m, code, "not for this peer", "", "P1", time.Now()).Encode()
	})}
	go func() { _ = srv.Serve(ln) }()
	t.Cleanup(func() { _ = srv.Close() })

	two := strings.Join([]string{
		readFile(t, filepath.Join(demoDir, "01-adult-female-creatinine.hl7")),
		readFile(t, filepath.Join(demoDir, "02-adult-male-umol.hl7")),
	}, "\n")
	out, _, err := runCLI(t, two, "send", "--to", ln.Addr().String(), "-")
	var ec exitCode
	require.ErrorAs(t, err, &ec, "a message not accepted makes send exit non-zero")
	require.Contains(t, out, "-\tNVL000101\tAA\tNVL000101\n")
	require.Contains(t, out, "-\tNVL000102\tAR\tNVL000102\t207 not for this peer\n")
	require.Contains(t, out, "2 sent, 1 not accepted")

	_, _, err = runCLI(t, "", "send", "x.hl7")
	require.ErrorContains(t, err, "--to")
}

func TestOutboxParkedAndRequeue(t *testing.T) {
	dir := t.TempDir()
	cfgPath := filepath.Join(dir, "f.yml")
	require.NoError(t, os.WriteFile(cfgPath, []byte("store: file:"+filepath.Join(dir, "o.db")+"\n"), 0o644))
	s, err := store.Open(context.Background(), "file:"+filepath.Join(dir, "o.db"))
	require.NoError(t, err)
	rc, err := s.Accept(context.Background(), store.Submission{DedupKey: "k1", Outbox: []store.OutboxMessage{{Destination: "hl7v2", MessageID: "M1", Payload: []byte("x")}}})
	require.NoError(t, err)
	items, err := s.Claim(context.Background(), "hl7v2", "t", 1, time.Minute)
	require.NoError(t, err)
	require.Len(t, items, 1)
	require.NoError(t, s.Park(context.Background(), items[0].ID, "AR error code 207"))
	require.NoError(t, s.Close())

	out, _, err := runCLI(t, "", "outbox", "parked", "--config", cfgPath)
	require.NoError(t, err)
	require.Contains(t, out, "\thl7v2\tM1\t1\t")
	require.Contains(t, out, "AR error code 207")
	out, _, err = runCLI(t, "", "outbox", "status", "--config", cfgPath)
	require.NoError(t, err)
	require.Contains(t, out, "hl7v2\t0\t0\t0s\t1")

	_, _, err = runCLI(t, "", "outbox", "requeue", strconv.FormatInt(rc.OutboxIDs[0], 10), "--config", cfgPath)
	require.NoError(t, err)
	out, _, err = runCLI(t, "", "outbox", "parked", "--config", cfgPath)
	require.NoError(t, err)
	require.Contains(t, out, "0 parked")
	_, _, err = runCLI(t, "", "outbox", "requeue", "999", "--config", cfgPath)
	require.Error(t, err)

	// Parked again, then discarded by a person.
	s, err = store.Open(context.Background(), "file:"+filepath.Join(dir, "o.db"))
	require.NoError(t, err)
	items, err = s.Claim(context.Background(), "hl7v2", "t", 1, time.Minute)
	require.NoError(t, err)
	require.Len(t, items, 1)
	require.NoError(t, s.Park(context.Background(), items[0].ID, "AR error code 207"))
	require.NoError(t, s.Close())
	_, _, err = runCLI(t, "", "outbox", "discard", strconv.FormatInt(items[0].ID, 10), "--config", cfgPath)
	require.ErrorContains(t, err, "--reason")
	out, _, err = runCLI(t, "", "outbox", "discard", strconv.FormatInt(items[0].ID, 10), "--reason", "resent by hand", "--config", cfgPath)
	require.NoError(t, err)
	require.Contains(t, out, "discarded")
	out, _, err = runCLI(t, "", "outbox", "parked", "--config", cfgPath)
	require.NoError(t, err)
	require.Contains(t, out, "0 parked")
}

// The demo's kept store goes through the auditor's commands: checkpoint,
// then verify against it.
func TestAuditCheckpointCommand(t *testing.T) {
	dir := t.TempDir()
	_, _, err := runCLI(t, "", "demo", "--scenario", demoDir, "--keep", dir)
	require.NoError(t, err)
	cfgPath := filepath.Join(dir, "filtrate.yml")
	cps := filepath.Join(dir, "checkpoints.jsonl")
	out, _, err := runCLI(t, "", "audit", "checkpoint", "--config", cfgPath, "--out", cps)
	require.NoError(t, err)
	require.Contains(t, out, "checkpoint at record 14 appended") // 11 HL7 v2 records + 3 FHIR results
	out, _, err = runCLI(t, "", "audit", "verify", "--config", cfgPath, "--checkpoints", cps)
	require.NoError(t, err, out)
	require.Contains(t, out, "audit verify: OK: 14 records")
}

func TestDryrunFHIR(t *testing.T) {
	req := filepath.Join("..", "..", "testdata", "fhir", "transaction-creatinine.request.json")
	out, _, err := runCLI(t, "", "dryrun", req)
	require.NoError(t, err)
	require.Contains(t, out, "FHIR  HTTP 200")
	require.Contains(t, out, `"type": "transaction"`, "the transaction Bundle that would be forwarded")
	require.Contains(t, out, `"code": "98979-8"`)

	out, _, err = runCLI(t, `{"resourceType":"Patient"}`, "dryrun", "-")
	var ec exitCode
	require.ErrorAs(t, err, &ec)
	require.Contains(t, out, "FHIR  HTTP 400")
	require.Contains(t, out, `"resourceType": "OperationOutcome"`)
}

func TestLoad(t *testing.T) {
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	require.NoError(t, err)
	var mu sync.Mutex
	ids := map[string]bool{}
	srv := &mllp.Server{Handler: mllp.HandlerFunc(func(_ context.Context, p []byte) []byte {
		m, err := hl7v2.Parse(p)
		if err != nil {
			return nil
		}
		mu.Lock()
		ids[m.ControlID()] = true
		mu.Unlock()
		return hl7v2.BuildACK(m, "AA", "", "", "L", time.Now()).Encode()
	})}
	go func() { _ = srv.Serve(ln) }()
	t.Cleanup(func() { _ = srv.Close() })
	out, _, err := runCLI(t, "", "load", "--to", ln.Addr().String(), "--messages", "60", "--concurrency", "3")
	require.NoError(t, err)
	require.Contains(t, out, "sent 60 messages")
	require.Contains(t, out, "  AA 60\n")
	require.Len(t, ids, 60, "every message has its own control ID")
}
