// Package ingest receives messages from the transports, runs them through
// the pipeline, and answers only once the result is durable: an HL7 v2
// acknowledgement over MLLP (AA after commit, AE when processing failed and
// the sender may retry, AR for what can never be accepted), and, for FHIR,
// the HTTP answer.
package ingest

import (
	"fmt"
	"time"

	"filtrate/calc"
	"filtrate/config"
	"filtrate/hl7v2"
	"filtrate/internal/pipeline"
)

// State is the configuration-derived state one message is processed under.
// A reload builds a new State completely and swaps it in.
type State struct {
	Snapshot *pipeline.Snapshot
	// Codes maps HL7 v2 OBX-3 codes (and FHIR codings) to analytes.
	Codes *hl7v2.CodeMap
	// Location is the zone of HL7 v2 times sent without a UTC offset.
	Location *time.Location
	// Retractions are the eGFR observations the policy can report, used to
	// withdraw them when an input is deleted or posted as wrong.
	Retractions []calc.Result
	// ForwardHL7 and ForwardFHIR tell whether enriched messages go
	// downstream (an outbox item per message) for each transport.
	ForwardHL7  bool
	ForwardFHIR bool
}

// Destination names used in the outbox; they are also metric label values.
const (
	DestinationHL7  = "hl7v2"
	DestinationFHIR = "fhir"
)

// RetractionTemplates lists, for a policy, one template per eGFR
// observation it can report (by equation), for hl7v2.EnrichOptions.
func RetractionTemplates(p calc.Policy, reg *calc.Registry) []calc.Result {
	seen := map[string]bool{}
	var out []calc.Result
	for _, b := range p.Bands {
		for _, id := range append([]string{b.Creatinine, b.CystatinC, b.Combined}, b.Extra...) {
			if id == "" || seen[id] {
				continue
			}
			e, ok := reg.Latest(id)
			if !ok {
				continue
			}
			seen[id] = true
			r := calc.Result{Equation: e.ID, EquationName: e.Name, Unit: e.Unit, Uses: e.Uses(), LOINC: e.LOINC, LOINCName: e.LOINCName}
			if c, ok := p.LOINC[e.ID]; ok && c != "" {
				r.LOINC = c
			}
			if r.LOINC == "" {
				r.LOINC, r.LOINCName = p.GenericLOINC, p.GenericLOINCName
			}
			out = append(out, r)
		}
	}
	return out
}

// StateFromConfig derives everything a message is processed under from a
// configuration.
func StateFromConfig(cfg *config.Config, reg *calc.Registry) (*State, error) {
	pol, err := cfg.Policy()
	if err != nil {
		return nil, fmt.Errorf("policy: %w", err)
	}
	codes, err := CodeMap(cfg)
	if err != nil {
		return nil, err
	}
	loc, err := cfg.Location()
	if err != nil {
		return nil, fmt.Errorf("timezone: %w", err)
	}
	return &State{
		Snapshot:    &pipeline.Snapshot{Policy: pol, Calibrations: cfg.Calibrations(), ConfigHash: cfg.Hash()},
		Codes:       codes,
		Location:    loc,
		Retractions: RetractionTemplates(pol, reg),
		ForwardHL7:  cfg.HL7v2.Forward != "",
		ForwardFHIR: cfg.FHIR.Forward != "",
	}, nil
}

// CodeMap builds the analyte code map: the built-in LOINC codes plus the
// configured local codes (a local entry overrides a built-in one).
func CodeMap(cfg *config.Config) (*hl7v2.CodeMap, error) {
	entries := hl7v2.DefaultCodeEntries()
	for _, a := range cfg.Analytes {
		entries = append(entries, hl7v2.CodeEntry{System: a.System, Code: a.Code, Analyte: a.Analyte, Unit: a.Unit})
	}
	m, err := hl7v2.NewCodeMap(entries...)
	if err != nil {
		return nil, fmt.Errorf("analytes: %w", err)
	}
	return m, nil
}
