// Package demo shows filtrate's whole job on invented data: it starts the
// daemon in-process on free loopback ports with a temporary store and a
// built-in downstream receiver, sends the demo scenario's HL7 v2 reports
// over MLLP and its FHIR requests over HTTP, and prints what reached the
// receiver, what the FHIR answers held and what the audit trail recorded.
package demo

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"net"
	"net/http"
	"os"
	"path/filepath"
	"sort"
	"strings"
	"sync"
	"time"

	"filtrate/config"
	"filtrate/hl7v2"
	"filtrate/hl7v2/mllp"
	"filtrate/internal/app"
	"filtrate/store"
)

// Options configure a demo run.
type Options struct {
	// ScenarioDir holds filtrate.yml and the *.hl7 reports.
	ScenarioDir string
	// KeepDir, when set, keeps the demo's store there instead of a
	// temporary directory, so that the audit commands can be tried on it.
	KeepDir string
	Version string
}

// receiver is the built-in downstream system: it acknowledges every
// message AA and keeps it.
type receiver struct {
	mu   sync.Mutex
	msgs map[string][]byte // by control ID
	got  chan struct{}
}

func (r *receiver) ServeMLLP(_ context.Context, p []byte) []byte {
	m, err := hl7v2.Parse(p)
	if err != nil {
		return hl7v2.BuildACK(nil, hl7v2.AckReject, "unreadable", "", "DEMO-RCV", time.Now()).Encode()
	}
	r.mu.Lock()
	_, seen := r.msgs[m.ControlID()]
	r.msgs[m.ControlID()] = append([]byte(nil), p...)
	r.mu.Unlock()
	if !seen {
		r.got <- struct{}{}
	}
	return hl7v2.BuildACK(m, hl7v2.AckAccept, "", "", "DEMO-RCV-"+m.ControlID(), time.Now()).Encode()
}

// Run runs the demo and writes its report to out.
func Run(ctx context.Context, out io.Writer, opts Options) error {
	cfgPath := filepath.Join(opts.ScenarioDir, "filtrate.yml")
	cfg, err := config.LoadFile(cfgPath)
	if err != nil {
		return fmt.Errorf("demo scenario not found or invalid (run from the repository root, or pass --scenario DIR): %w", err)
	}
	files, err := filepath.Glob(filepath.Join(opts.ScenarioDir, "*.hl7"))
	if err != nil || len(files) == 0 {
		return fmt.Errorf("demo scenario: no *.hl7 reports in %s", opts.ScenarioDir)
	}
	sort.Strings(files)

	dir := opts.KeepDir
	if dir == "" {
		if dir, err = os.MkdirTemp("", "filtrate-demo-"); err != nil {
			return err
		}
		defer os.RemoveAll(dir)
	} else if err := os.MkdirAll(dir, 0o755); err != nil {
		return err
	}

	// The downstream receiver.
	rcv := &receiver{msgs: map[string][]byte{}, got: make(chan struct{}, len(files))}
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		return err
	}
	rsrv := &mllp.Server{Handler: rcv}
	go func() { _ = rsrv.Serve(ln) }()
	defer rsrv.Close()

	cfg.Store = "file:" + filepath.Join(dir, "demo.db")
	cfg.HL7v2.Listen = "127.0.0.1:0"
	cfg.HTTP.Listen = "127.0.0.1:0"
	cfg.HL7v2.Forward = ln.Addr().String()
	a, err := app.New(ctx, app.Options{Config: cfg, Version: opts.Version, ForwardPoll: 50 * time.Millisecond, WorkerName: "demo"})
	if err != nil {
		return err
	}
	runCtx, stop := context.WithCancel(ctx)
	done := make(chan error, 1)
	go func() { done <- a.Run(runCtx) }()
	defer func() { stop(); <-done }()

	st := a.State()
	fmt.Fprintf(out, "filtrate demo: %s\n", cfg.Site)
	fmt.Fprintf(out, "Every patient, code and calibration rule here is invented.\n")
	fmt.Fprintf(out, "Policy %s (version %s), configuration %s\n", st.Snapshot.Policy.Name, st.Snapshot.Policy.Version, short(st.Snapshot.ConfigHash))
	fmt.Fprintf(out, "Daemon: HL7 v2 on %s, HTTP on %s; downstream receiver on %s\n\n", a.HL7Addr(), a.HTTPAddr(), ln.Addr())

	client, err := mllp.Dial(ctx, a.HL7Addr(), mllp.ClientOptions{})
	if err != nil {
		return err
	}
	defer client.Close()
	acks := map[string]string{}
	var order []string
	for _, f := range files {
		raw, err := os.ReadFile(f)
		if err != nil {
			return err
		}
		for _, m := range hl7v2.SplitMessages(raw) {
			res, err := client.Send(ctx, m)
			if err != nil {
				return fmt.Errorf("send %s: %w", filepath.Base(f), err)
			}
			ack, err := hl7v2.ParseACK(res)
			if err != nil {
				return fmt.Errorf("acknowledgement for %s: %w", filepath.Base(f), err)
			}
			acks[ack.ControlID] = ack.Code
			order = append(order, ack.ControlID)
		}
	}
	// Wait for every accepted report to reach the receiver.
	want := 0
	for _, c := range acks {
		if c == hl7v2.AckAccept {
			want++
		}
	}
	deadline := time.After(30 * time.Second)
	for range want {
		select {
		case <-rcv.got:
		case <-deadline:
			return errors.New("demo: reports did not reach the downstream receiver in 30 s")
		case <-ctx.Done():
			return ctx.Err()
		}
	}

	// FHIR requests of the scenario, answered by the same daemon.
	jsonFiles, _ := filepath.Glob(filepath.Join(opts.ScenarioDir, "*.json"))
	sort.Strings(jsonFiles)
	type fhirResult struct {
		name   string
		status int
		body   []byte
	}
	var fhirResults []fhirResult
	for _, f := range jsonFiles {
		body, err := os.ReadFile(f)
		if err != nil {
			return err
		}
		req, err := http.NewRequestWithContext(ctx, http.MethodPost, "http://"+a.HTTPAddr()+"/fhir", bytes.NewReader(body))
		if err != nil {
			return err
		}
		req.Header.Set("Content-Type", "application/fhir+json")
		resp, err := http.DefaultClient.Do(req)
		if err != nil {
			return fmt.Errorf("demo: FHIR request %s: %w", filepath.Base(f), err)
		}
		answer, err := io.ReadAll(resp.Body)
		resp.Body.Close()
		if err != nil {
			return err
		}
		fhirResults = append(fhirResults, fhirResult{name: filepath.Base(f), status: resp.StatusCode, body: answer})
	}

	cautions := map[string]bool{}
	for _, c := range st.Snapshot.Policy.Cautions {
		cautions[c] = true
	}
	for _, id := range order {
		rcv.mu.Lock()
		fwd := rcv.msgs[id]
		rcv.mu.Unlock()
		printReport(out, id, acks[id], fwd, cautions)
	}
	for _, r := range fhirResults {
		printFHIR(out, r.name, r.status, r.body, cautions)
	}
	fmt.Fprintln(out, "Cautions attached to every eGFR:")
	for _, c := range st.Snapshot.Policy.Cautions {
		fmt.Fprintln(out, "  - "+c)
	}
	fmt.Fprintln(out)
	if err := auditSummary(ctx, out, a.Store(), want); err != nil {
		return err
	}
	if opts.KeepDir != "" {
		fmt.Fprintf(out, "\nThe demo store is kept in %s; try:\n  filtrate audit search --config %s\n", dir, keepConfig(dir, cfg))
	}
	return nil
}

func short(h string) string {
	if len(h) > 12 {
		return h[:12] + "…"
	}
	return h
}

// keepConfig writes a minimal configuration pointing at the kept store.
func keepConfig(dir string, cfg *config.Config) string {
	p := filepath.Join(dir, "filtrate.yml")
	_ = os.WriteFile(p, []byte("store: "+cfg.Store+"\n"), 0o644)
	return p
}

// printReport shows one forwarded report as a person reads it.
func printReport(out io.Writer, id, ack string, fwd []byte, cautions map[string]bool) {
	fmt.Fprintf(out, "Report %s: acknowledged %s", id, ack)
	if fwd == nil {
		fmt.Fprintln(out, ", not forwarded")
		fmt.Fprintln(out)
		return
	}
	fmt.Fprintln(out, ", forwarded")
	m, err := hl7v2.Parse(fwd)
	if err != nil {
		fmt.Fprintln(out, "  (forwarded message unreadable)")
		return
	}
	if pid := m.First("PID"); pid != nil {
		fmt.Fprintf(out, "  patient %s  sex %s  born %s\n", pid.Field(3).Component(1).String(), orDash(pid.Field(8).String()), orDash(pid.Field(7).String()))
	}
	lastWasEGFR := false
	for _, seg := range m.Segments() {
		switch seg.Name() {
		case "OBR":
			fmt.Fprintf(out, "  specimen collected %s\n", orDash(seg.Field(7).String()))
		case "OBX":
			name := seg.Field(3).Component(2).String()
			value := strings.ReplaceAll(seg.Field(5).Raw(), "^", "")
			unit := seg.Field(6).Component(1).String()
			method := seg.Field(17).Component(2).String()
			status := seg.Field(11).String()
			lastWasEGFR = strings.HasPrefix(seg.Field(17).Component(1).String(), "ckd-") || strings.Contains(name, "Glomerular filtration rate")
			if lastWasEGFR {
				fmt.Fprintf(out, "  => eGFR %s %s by %s (LOINC %s, status %s)\n", value, unit, method, seg.Field(3).Component(1).String(), status)
			} else {
				fmt.Fprintf(out, "  %-58.58s %s %s (status %s)\n", name, value, unit, status)
			}
		case "NTE":
			text := seg.Field(3).String()
			if cautions[text] {
				continue
			}
			prefix := "     note: "
			if lastWasEGFR {
				prefix = "       "
			}
			fmt.Fprintln(out, prefix+text)
		}
	}
	fmt.Fprintln(out)
}

func orDash(s string) string {
	if s == "" {
		return "(missing)"
	}
	return s
}

// auditSummary verifies the hash chain and summarises what was recorded.
func auditSummary(ctx context.Context, out io.Writer, s store.Store, delivered int) error {
	v := store.NewVerifier()
	computed := map[string]int{}
	refused := map[string]int{}
	messages := map[string]bool{}
	n := 0
	err := s.Walk(ctx, 1, func(r store.AuditRecord) error {
		n++
		v.Add(r)
		messages[r.MessageID] = true
		if r.SuppressionCode != "" {
			refused[r.SuppressionCode]++
		} else {
			computed[r.Equation]++
		}
		return nil
	})
	if err != nil {
		return err
	}
	head, err := s.Head(ctx)
	if err != nil {
		return err
	}
	v.CheckHead(head)
	verdict := "hash chain verified"
	if !v.OK() {
		verdict = fmt.Sprintf("HASH CHAIN BROKEN: %v", v.Problems())
	}
	fmt.Fprintf(out, "Audit trail: %d records from %d reports; %s (head #%d %s)\n", n, len(messages), verdict, head.LastID, short(head.LastHash))
	fmt.Fprintf(out, "  computed: %s\n", counts(computed))
	fmt.Fprintf(out, "  refused:  %s\n", counts(refused))
	fmt.Fprintf(out, "The HL7 v2 downstream receiver got %d reports, each once.\n", delivered)
	fmt.Fprintln(out, "\neGFR is an estimate; local laboratory policy and licensed clinicians decide, and local regulations apply.")
	if !v.OK() {
		return errors.New("demo: audit chain does not verify")
	}
	return nil
}

func counts(m map[string]int) string {
	if len(m) == 0 {
		return "none"
	}
	keys := make([]string, 0, len(m))
	for k := range m {
		keys = append(keys, k)
	}
	sort.Strings(keys)
	parts := make([]string, 0, len(keys))
	for _, k := range keys {
		parts = append(parts, fmt.Sprintf("%s %d", k, m[k]))
	}
	return strings.Join(parts, ", ")
}

// printFHIR shows the eGFR Observations and the issues of a FHIR answer.
func printFHIR(out io.Writer, name string, status int, body []byte, cautions map[string]bool) {
	fmt.Fprintf(out, "FHIR request %s: HTTP %d\n", name, status)
	var b struct {
		Entry []struct {
			Resource json.RawMessage `json:"resource"`
		} `json:"entry"`
	}
	if err := json.Unmarshal(body, &b); err != nil {
		fmt.Fprintln(out, "  (answer unreadable)")
		return
	}
	for _, e := range b.Entry {
		var r struct {
			ResourceType string `json:"resourceType"`
			Status       string `json:"status"`
			Code         struct {
				Coding []struct{ Code string } `json:"coding"`
				Text   string                  `json:"text"`
			} `json:"code"`
			ValueQuantity *struct {
				Value      float64 `json:"value"`
				Comparator string  `json:"comparator"`
				Code       string  `json:"code"`
			} `json:"valueQuantity"`
			Note  []struct{ Text string } `json:"note"`
			Issue []struct {
				Diagnostics string `json:"diagnostics"`
			} `json:"issue"`
		}
		if json.Unmarshal(e.Resource, &r) != nil {
			continue
		}
		switch r.ResourceType {
		case "Observation":
			if r.ValueQuantity == nil || len(r.Code.Coding) == 0 {
				continue
			}
			fmt.Fprintf(out, "  => %s %s%g %s (LOINC %s, status %s)\n", r.Code.Text, r.ValueQuantity.Comparator,
				r.ValueQuantity.Value, r.ValueQuantity.Code, r.Code.Coding[0].Code, r.Status)
			for _, n := range r.Note {
				if !cautions[n.Text] {
					fmt.Fprintln(out, "       "+n.Text)
				}
			}
		case "OperationOutcome":
			for _, is := range r.Issue {
				fmt.Fprintln(out, "     note: "+is.Diagnostics)
			}
		}
	}
	fmt.Fprintln(out)
}
