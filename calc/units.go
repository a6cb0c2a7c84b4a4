package calc

import (
	"errors"
	"fmt"
	"math"
	"strconv"
	"strings"
)

// CreatinineMgDLToUmolL is the factor from creatinine mg/dL to µmol/L.
//
// Choice: 88.4. Creatinine's molar mass is 113.12 g/mol, so 1 mg/dL =
// 10 mg/L ÷ 113.12 g/mol = 88.40 µmol/L; 88.4 is also the factor printed by
// the CKD-EPI papers (Levey 2009; Inker 2021: "divide by 88.4") and by the
// EKFC paper (Pottel 2021). The 88.42 sometimes printed carries a spurious
// fourth digit (it corresponds to a molar mass of 113.10 g/mol).
const CreatinineMgDLToUmolL = 88.4

// CanonicalUnit is the unit in which equations receive an analyte (UCUM).
func CanonicalUnit(a Analyte) string {
	switch a {
	case Creatinine, UrineCreatinine:
		return "mg/dL"
	case CystatinC:
		return "mg/L"
	case Height:
		return "cm"
	case Weight:
		return "kg"
	case UrineVolume:
		return "mL"
	case CollectionTime:
		return "min"
	default:
		return ""
	}
}

// unitFactors maps, per analyte, each accepted unit spelling (after
// normalisation by normUnit) to the factor that converts it to the canonical
// unit. Only units listed here are accepted: an unknown unit is an error,
// never a guess.
func unitFactors(a Analyte) map[string]float64 {
	switch a {
	case Creatinine, UrineCreatinine:
		return map[string]float64{
			"mg/dl":  1,
			"umol/l": 1 / CreatinineMgDLToUmolL,
			"mmol/l": 1000 / CreatinineMgDLToUmolL,
		}
	case CystatinC:
		return map[string]float64{"mg/l": 1}
	case Height:
		return map[string]float64{"cm": 1, "m": 100, "[in_i]": 2.54} // international inch = 2.54 cm exactly (UCUM)
	case Weight:
		return map[string]float64{"kg": 1, "g": 0.001, "[lb_av]": 0.45359237} // avoirdupois pound = 0.45359237 kg exactly (UCUM)
	case UrineVolume:
		return map[string]float64{"ml": 1, "l": 1000, "dl": 100}
	case CollectionTime:
		return map[string]float64{"min": 1, "h": 60, "d": 1440}
	default:
		return nil
	}
}

// normUnit folds the spellings of one unit together: case, surrounding
// blanks, and the micro sign (U+00B5) and Greek mu (U+03BC) to "u".
func normUnit(u string) string {
	u = strings.TrimSpace(u)
	u = strings.ReplaceAll(u, "\u00b5", "u")
	u = strings.ReplaceAll(u, "\u03bc", "u")
	if strings.HasPrefix(u, "[") { // UCUM bracketed atoms are case-sensitive
		return u
	}
	return strings.ToLower(u)
}

// UnitError reports a unit calc does not accept for an analyte.
type UnitError struct {
	Analyte Analyte
	Unit    string
}

func (e *UnitError) Error() string {
	return fmt.Sprintf("calc: unit %q is not accepted for %s", e.Unit, e.Analyte)
}

// ToCanonical converts a value in unit to the analyte's canonical unit. The
// factor is returned too so that the conversion can be shown as a step.
//
// A value that is, or becomes after conversion, NaN or infinite is refused
// with an error wrapping [ErrNotFinite].
func ToCanonical(a Analyte, value float64, unit string) (float64, float64, error) {
	f, ok := unitFactors(a)[normUnit(unit)]
	if !ok {
		return 0, 0, &UnitError{Analyte: a, Unit: unit}
	}
	v := value * f
	if math.IsNaN(v) || math.IsInf(v, 0) {
		return 0, 0, fmt.Errorf("calc: converting %s to %s: %w", a, CanonicalUnit(a), ErrNotFinite)
	}
	return v, f, nil
}

// FromCanonical converts a canonical value to unit. Like [ToCanonical], it
// refuses a non-finite value or result with an error wrapping [ErrNotFinite].
func FromCanonical(a Analyte, value float64, unit string) (float64, error) {
	f, ok := unitFactors(a)[normUnit(unit)]
	if !ok {
		return 0, &UnitError{Analyte: a, Unit: unit}
	}
	v := value / f
	if math.IsNaN(v) || math.IsInf(v, 0) {
		return 0, fmt.Errorf("calc: converting %s from %s: %w", a, CanonicalUnit(a), ErrNotFinite)
	}
	return v, nil
}

// ErrNotFinite reports a value that is, or becomes after unit conversion,
// NaN or infinite (for example 1e308 mmol/L). Callers refuse it as
// implausible ([ReasonValueImplausible]).
var ErrNotFinite = errors.New("value is not finite")

// KnownUnit reports whether unit is accepted for the analyte.
func KnownUnit(a Analyte, unit string) bool {
	_, ok := unitFactors(a)[normUnit(unit)]
	return ok
}

// ParseValue reads a result value as text. Censored values ("<0.2", ">20",
// "<=", ">="), non-numeric text and non-finite numbers are refused with the
// matching reason.
func ParseValue(text string) (float64, Reason) {
	t := strings.TrimSpace(text)
	if t == "" {
		return 0, ReasonInputMissing
	}
	if strings.ContainsAny(t[:1], "<>") || strings.HasPrefix(t, "≤") || strings.HasPrefix(t, "≥") {
		return 0, ReasonValueCensored
	}
	v, err := strconv.ParseFloat(t, 64)
	if err != nil || math.IsNaN(v) || math.IsInf(v, 0) {
		return 0, ReasonValueNotNumeric
	}
	// Reject hexadecimal and exponent-free oddities strconv accepts.
	if strings.ContainsAny(t, "xXpP_iInN") {
		return 0, ReasonValueNotNumeric
	}
	return v, ""
}

// Range is an inclusive plausibility range in the analyte's canonical unit.
type Range struct {
	Min, Max float64
}

// Contains reports whether v lies in the range.
func (r Range) Contains(v float64) bool { return v >= r.Min && v <= r.Max }

// DefaultPlausible returns the plausibility ranges used unless the policy
// overrides them, in canonical units. They are deliberately wide: they exist
// to catch a value reported in the wrong unit (85 labelled mg/dL is a
// µmol/L value; 0.9 labelled µmol/L is a mg/dL value), not to judge
// pathology. Common practice, not from a published table.
func DefaultPlausible() map[Analyte]Range {
	return map[Analyte]Range{
		Creatinine:      {Min: 0.1, Max: 25},      // 8.8–2210 µmol/L
		CystatinC:       {Min: 0.2, Max: 10},      // mg/L
		Height:          {Min: 30, Max: 250},      // cm
		Weight:          {Min: 0.5, Max: 400},     // kg
		UrineCreatinine: {Min: 1, Max: 1000},      // mg/dL
		UrineVolume:     {Min: 10, Max: 15000},    // mL
		CollectionTime:  {Min: 60, Max: 2 * 1440}, // min
	}
}
