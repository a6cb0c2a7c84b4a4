package audit

import (
	"bufio"
	"encoding/json"
	"fmt"
	"io"
	"strings"
	"time"

	"filtrate/calc"
	"filtrate/store"
)

// Render writes rec as a person reads it: source, patient as received,
// each input as received and as used, the equation and every step of the
// arithmetic, the exact and reported value, comments, suppression, policy,
// configuration and software, chain hashes, and the recompute verdict v
// (from [Recomputer.Recompute]) as the last line.
//
// Render displays patient data; it is meant for the auditor's terminal
// ("filtrate audit show") and nothing else.
func Render(w io.Writer, rec store.AuditRecord, v Verdict) error {
	bw := bufio.NewWriter(w)
	line := func(label, value string) {
		if value == "" {
			value = "-"
		}
		fmt.Fprintf(bw, "  %-20s %s\n", label, value)
	}
	section := func(title string) { fmt.Fprintf(bw, "\n%s\n", title) }

	fmt.Fprintf(bw, "Audit record %d\n", rec.ID)
	line("recorded at", timeText(rec.RecordedAt))
	line("content hash", rec.ContentHash)
	line("previous hash", rec.PrevHash)

	section("Source")
	line("transport", rec.Transport)
	line("message ID", rec.MessageID)
	line("raw message SHA-256", rec.RawHash)
	line("output message ID", rec.OutputMessageID)

	section("Patient (as received)")
	line("patient ID", rec.PatientID)
	line("birth date", rec.BirthDate)
	line("sex", rec.Sex)
	line("specimen collected", timeText(rec.CollectedAt))
	if v.AgeYears != nil {
		line("age used", fmt.Sprintf("%s years (%s)", formatExact(*v.AgeYears), v.AgeBasis))
	}

	section("Inputs (as received → as used)")
	renderInputs(bw, rec.Inputs)

	section("Calculation")
	eq := rec.Equation
	if eq != "" {
		name := v.EquationName
		if name == "" {
			name = "not known to this build"
		}
		ver := rec.EquationVersion
		if ver == "" {
			ver = "not recorded"
		}
		eq = fmt.Sprintf("%s version %s (%s)", rec.Equation, ver, name)
	}
	line("equation", eq)
	renderSteps(bw, rec.Steps)
	if rec.Exact != nil {
		line("exact", formatExact(*rec.Exact))
	} else {
		line("exact", "no value computed")
	}
	reported := rec.Reported
	if reported != "" && rec.Unit != "" {
		reported += " " + rec.Unit
	}
	line("reported", reported)
	line("unit", rec.Unit)
	line("category", rec.Category)
	if len(rec.Comments) == 0 {
		line("comments", "")
	}
	for i, c := range rec.Comments {
		label := ""
		if i == 0 {
			label = "comments"
		}
		line(label, "- "+c)
	}
	sup := rec.SuppressionCode
	if rec.SuppressionText != "" {
		sup += ": " + rec.SuppressionText
	}
	line("suppression", sup)

	section("Rules and software")
	pol := rec.Policy
	if rec.PolicyVersion != "" {
		pol += " version " + rec.PolicyVersion
	}
	line("policy", pol)
	line("configuration hash", rec.ConfigHash)
	line("software version", rec.SoftwareVersion)

	fmt.Fprintf(bw, "\nRecompute: %s\n", v.String())
	return bw.Flush()
}

func timeText(t time.Time) string {
	if t.IsZero() {
		return ""
	}
	return t.UTC().Format(time.RFC3339Nano)
}

func renderInputs(w io.Writer, raw json.RawMessage) {
	if len(raw) == 0 {
		fmt.Fprintln(w, "  none recorded")
		return
	}
	var ins []calc.InputUse
	if err := json.Unmarshal(raw, &ins); err != nil {
		fmt.Fprintln(w, "  (the stored inputs do not decode; raw JSON follows)")
		fmt.Fprintf(w, "  %s\n", raw)
		return
	}
	if len(ins) == 0 {
		fmt.Fprintln(w, "  none")
	}
	for i, in := range ins {
		src := ""
		if in.SourceID != "" {
			src = " [" + in.SourceID + "]"
		}
		used := fmt.Sprintf("%s %s", formatExact(in.Used), in.UsedUnit)
		if !in.Accepted {
			used = "not used"
			if in.Used != 0 {
				used = fmt.Sprintf("%s %s, not used", formatExact(in.Used), in.UsedUnit)
			}
		}
		fmt.Fprintf(w, "  %d. %s%s: %q %s → %s\n", i+1, in.Analyte, src, in.ValueText, in.Unit, used)
		var assay []string
		for _, kv := range [][2]string{{"method", in.Method}, {"instrument", in.Instrument}, {"reagent lot", in.ReagentLot}} {
			if kv[1] != "" {
				assay = append(assay, kv[0]+" "+kv[1])
			}
		}
		if len(assay) > 0 {
			fmt.Fprintf(w, "       assay: %s\n", strings.Join(assay, ", "))
		}
		if in.Calibration != "" {
			trace := "not stated"
			if in.Traceable != nil {
				trace = "no"
				if *in.Traceable {
					trace = "yes"
				}
			}
			fmt.Fprintf(w, "       calibration rule %s version %s, traceable: %s\n", in.Calibration, in.CalibrationV, trace)
		} else {
			fmt.Fprintln(w, "       no calibration rule applied")
		}
		for _, s := range in.Steps {
			fmt.Fprintf(w, "       %s = %s   (%s)\n", s.Name, formatExact(s.Value), s.Formula)
		}
	}
}

func renderSteps(w io.Writer, raw json.RawMessage) {
	var steps []calc.Step
	if len(raw) > 0 {
		if err := json.Unmarshal(raw, &steps); err != nil {
			fmt.Fprintf(w, "  %-20s (do not decode) %s\n", "steps", raw)
			return
		}
	}
	if len(steps) == 0 {
		fmt.Fprintf(w, "  %-20s %s\n", "steps", "-")
		return
	}
	fmt.Fprintln(w, "  steps")
	for i, s := range steps {
		fmt.Fprintf(w, "    %2d. %-24s = %-22s %s\n", i+1, s.Name, formatExact(s.Value), s.Formula)
	}
}
