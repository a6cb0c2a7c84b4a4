package calc

import (
	"fmt"
	"time"
)

// CalibrationRule maps a measured value from one assay to the value used by
// the equations: used = Slope × measured + Intercept, applied in Unit.
//
// A rule matches a measurement of Analyte when Method and Instrument equal
// the measurement's (an empty field matches any value), ReagentLot equals it
// when set, and the collection time lies in [EffectiveFrom, EffectiveTo)
// (zero times are open ends). The most specific matching rule applies; two
// equally specific matches are ambiguous and refused.
type CalibrationRule struct {
	ID            string    `json:"id"`
	Version       string    `json:"version"`
	Analyte       Analyte   `json:"analyte"`
	Method        string    `json:"method,omitempty"`
	Instrument    string    `json:"instrument,omitempty"`
	ReagentLot    string    `json:"reagent_lot,omitempty"`
	EffectiveFrom time.Time `json:"effective_from,omitzero"`
	EffectiveTo   time.Time `json:"effective_to,omitzero"`
	Slope         float64   `json:"slope"`
	Intercept     float64   `json:"intercept"`
	Unit          string    `json:"unit"`
	// Traceable states that the calibrated result is traceable to the
	// reference system: IDMS for creatinine, ERM-DA471/IFCC for cystatin C.
	Traceable bool `json:"traceable"`
}

// Validate checks a rule for internal consistency.
func (r CalibrationRule) Validate() error {
	switch {
	case r.ID == "":
		return fmt.Errorf("calibration rule: id is required")
	case r.Version == "":
		return fmt.Errorf("calibration rule %s: version is required", r.ID)
	case CanonicalUnit(r.Analyte) == "":
		return fmt.Errorf("calibration rule %s: unknown analyte %q", r.ID, r.Analyte)
	case !KnownUnit(r.Analyte, r.Unit):
		return fmt.Errorf("calibration rule %s: unit %q is not accepted for %s", r.ID, r.Unit, r.Analyte)
	case !(r.Slope > 0):
		return fmt.Errorf("calibration rule %s: slope must be positive", r.ID)
	case !r.EffectiveTo.IsZero() && !r.EffectiveTo.After(r.EffectiveFrom):
		return fmt.Errorf("calibration rule %s: effective_to must be after effective_from", r.ID)
	}
	return nil
}

func (r CalibrationRule) matches(m Measurement, at time.Time) bool {
	if r.Analyte != m.Analyte {
		return false
	}
	if r.Method != "" && r.Method != m.Method {
		return false
	}
	if r.Instrument != "" && r.Instrument != m.Instrument {
		return false
	}
	if r.ReagentLot != "" && r.ReagentLot != m.ReagentLot {
		return false
	}
	if !r.EffectiveFrom.IsZero() && at.Before(r.EffectiveFrom) {
		return false
	}
	if !r.EffectiveTo.IsZero() && !at.Before(r.EffectiveTo) {
		return false
	}
	return true
}

func (r CalibrationRule) specificity() int {
	n := 0
	for _, s := range []string{r.Method, r.Instrument, r.ReagentLot} {
		if s != "" {
			n++
		}
	}
	return n
}

// findCalibration returns the rule for a measurement, or ok false when none
// matches, or ambiguous true when two equally specific rules match.
func findCalibration(rules []CalibrationRule, m Measurement, at time.Time) (rule CalibrationRule, ok, ambiguous bool) {
	best := -1
	for _, r := range rules {
		if !r.matches(m, at) {
			continue
		}
		switch s := r.specificity(); {
		case s > best:
			rule, best, ambiguous = r, s, false
		case s == best:
			ambiguous = true
		}
	}
	return rule, best >= 0, ambiguous
}
