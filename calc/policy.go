package calc

import (
	"fmt"
	"sort"
)

// SexRule says what happens when sex is missing or neither female nor male.
type SexRule string

// Sex rules.
const (
	// SexRuleRefuse reports no eGFR from a sex-specific equation.
	SexRuleRefuse SexRule = "refuse"
	// SexRuleBoth reports two values, computed as if female and as if male,
	// each clearly labelled.
	SexRuleBoth SexRule = "both"
)

// Band chooses equations for one age band, [MinAge, MaxAge) in years
// (MaxAge 0: no upper bound).
type Band struct {
	MinAge     float64 `json:"min_age"`
	MaxAge     float64 `json:"max_age,omitempty"`
	Creatinine string  `json:"creatinine,omitempty"` // when creatinine is usable
	CystatinC  string  `json:"cystatin_c,omitempty"` // when cystatin C is usable
	Combined   string  `json:"combined,omitempty"`   // when both are usable
	// PrimaryWhenBoth names the primary result when both analytes are
	// usable; empty means Combined (or Creatinine when there is none).
	PrimaryWhenBoth string `json:"primary_when_both,omitempty"`
	// Extra equations are computed when, and only when, all their inputs are
	// present (for example Cockcroft–Gault when weight is reported).
	Extra []string `json:"extra,omitempty"`
}

func (b Band) contains(age float64) bool {
	return age >= b.MinAge && (b.MaxAge == 0 || age < b.MaxAge)
}

// Policy is a laboratory's reporting policy. Presets come from Preset; a
// configuration may override any field. A Policy travels inside every
// Request so that a stored request recomputes under the policy it was made
// with.
type Policy struct {
	Name    string `json:"name"`
	Version string `json:"version"`
	Bands   []Band `json:"bands"`
	// DecimalAgeBelow: patients younger than this (in completed years) are
	// computed with decimal age, older ones with completed years, as age is
	// printed on adult reports. Common practice; paediatric equations
	// change quickly with age.
	DecimalAgeBelow float64 `json:"decimal_age_below"`
	// Decimals is the number of decimals reported (0: whole numbers).
	Decimals int `json:"decimals"`
	// CapAbove, when positive, reports values above it as ">CapAbove".
	CapAbove   float64 `json:"cap_above,omitempty"`
	SexUnknown SexRule `json:"sex_unknown"`
	// RequireTraceable refuses eGFR from an assay that no calibration rule
	// declares traceable to the reference system.
	RequireTraceable bool `json:"require_traceable"`
	// Cautions are attached to every reported value.
	Cautions []string `json:"cautions,omitempty"`
	// GenericLOINC (and its name) codes equations without a specific code.
	GenericLOINC     string `json:"generic_loinc"`
	GenericLOINCName string `json:"generic_loinc_name"`
	// LOINC overrides the output code per equation ID.
	LOINC map[string]string `json:"loinc,omitempty"`
	// Plausible overrides the default plausibility ranges (canonical units).
	Plausible map[Analyte]Range `json:"plausible,omitempty"`
	// NonIndexed adds the BSA-de-indexed value in mL/min when height and
	// weight are known (for drug dosing); BSAMethod is "dubois" or "mosteller".
	NonIndexed bool   `json:"non_indexed,omitempty"`
	BSAMethod  string `json:"bsa_method,omitempty"`
	// IndexClearance adds, to clearances reported in mL/min (measured
	// timed-urine clearance, Cockcroft–Gault), the value per 1.73 m² when
	// height and weight are known.
	IndexClearance bool `json:"index_clearance,omitempty"`
}

// DefaultCautions are the comments attached to every eGFR by the presets.
func DefaultCautions() []string {
	return []string{
		"eGFR is an estimate and assumes stable kidney function; it is unreliable in acute kidney injury, pregnancy, very high or low muscle mass or unusual diet, and after amputation.",
		"Drug dosing may need the non-indexed value in mL/min. Interpret with the clinical picture; local laboratory policy applies.",
	}
}

// Generic LOINC code for an eGFR whose equation has no specific code.
const (
	GenericLOINC     = "69405-9"
	GenericLOINCName = "Glomerular filtration rate/1.73 sq M.predicted [Volume Rate/Area] in Serum, Plasma or Blood"
)

// Preset returns a named reporting policy. Names: "nkf-asn-2021" (United
// States), "ekfc" (Europe), "nice-2021" (United Kingdom).
func Preset(name string) (Policy, error) {
	base := Policy{
		Version:          "1",
		DecimalAgeBelow:  18,
		SexUnknown:       SexRuleRefuse,
		Cautions:         DefaultCautions(),
		GenericLOINC:     GenericLOINC,
		GenericLOINCName: GenericLOINCName,
		BSAMethod:        "dubois",
	}
	// Children 1–17 with height: CKiD U25 (Pierce 2021), otherwise no eGFR
	// from creatinine (the cystatin C equation needs no height).
	children := Band{MinAge: 1, MaxAge: 18, Creatinine: "ckid-u25-cr", CystatinC: "ckid-u25-cys", Combined: "ckid-u25-crcys"}
	switch name {
	case "nkf-asn-2021":
		// NKF-ASN Task Force (Delgado C et al., Am J Kidney Dis
		// 2022;79:268-288; J Am Soc Nephrol 2021;32:2994-3015): race-free
		// CKD-EPI 2021 creatinine, and creatinine–cystatin C when cystatin C
		// is measured.
		base.Name = name
		base.Bands = []Band{children, {
			MinAge: 18, Creatinine: "ckd-epi-2021-cr", CystatinC: "ckd-epi-2012-cys",
			Combined: "ckd-epi-2021-crcys", Extra: []string{"crcl-timed-urine"},
		}}
	case "ekfc":
		// European Kidney Function Consortium: one equation across the age
		// range from 2 years (Pottel 2021; cystatin C Pottel 2023), without
		// height. Under 2 years EKFC is not validated: CKiD U25 from 1. EKFC
		// cystatin C (and so the mean of the two) is used from 18, where its
		// Q was estimated (Pottel 2023).
		base.Name = name
		base.Bands = []Band{
			{MinAge: 1, MaxAge: 2, Creatinine: "ckid-u25-cr", CystatinC: "ckid-u25-cys", Combined: "ckid-u25-crcys"},
			{MinAge: 2, Creatinine: "ekfc-cr", CystatinC: "ekfc-cys", Combined: "ekfc-crcys", Extra: []string{"crcl-timed-urine"}},
		}
	case "nice-2021":
		// NICE NG203 (2021), recommendations 1.1.1 and 1.1.8: CKD-EPI
		// creatinine (2009) without the race adjustment; cystatin C-based
		// eGFR (CKD-EPI 2012) where cystatin C is measured to confirm a
		// diagnosis. Values above 90 reported as ">90": common UK practice.
		base.Name = name
		base.CapAbove = 90
		base.Bands = []Band{children, {
			MinAge: 18, Creatinine: "ckd-epi-2009-cr", CystatinC: "ckd-epi-2012-cys",
			PrimaryWhenBoth: "ckd-epi-2012-cys", Extra: []string{"crcl-timed-urine"},
		}}
	default:
		return Policy{}, fmt.Errorf("calc: unknown policy preset %q (known: %v)", name, PresetNames())
	}
	return base, nil
}

// PresetNames lists the preset names.
func PresetNames() []string {
	n := []string{"nkf-asn-2021", "ekfc", "nice-2021"}
	sort.Strings(n)
	return n
}

// Validate checks that a policy is complete and names only equations in reg.
func (p Policy) Validate(reg *Registry) error {
	if p.Name == "" {
		return fmt.Errorf("policy: name is required")
	}
	if p.Version == "" {
		return fmt.Errorf("policy %s: version is required", p.Name)
	}
	if p.SexUnknown != SexRuleRefuse && p.SexUnknown != SexRuleBoth {
		return fmt.Errorf("policy %s: sex_unknown must be %q or %q, not %q", p.Name, SexRuleRefuse, SexRuleBoth, p.SexUnknown)
	}
	if p.Decimals < 0 || p.Decimals > 2 {
		return fmt.Errorf("policy %s: decimals must be 0, 1 or 2", p.Name)
	}
	if p.CapAbove < 0 {
		return fmt.Errorf("policy %s: cap_above must not be negative", p.Name)
	}
	if p.BSAMethod != "" && p.BSAMethod != "dubois" && p.BSAMethod != "mosteller" {
		return fmt.Errorf("policy %s: bsa_method must be dubois or mosteller", p.Name)
	}
	if len(p.Bands) == 0 {
		return fmt.Errorf("policy %s: at least one age band is required", p.Name)
	}
	for i, b := range p.Bands {
		if b.MaxAge != 0 && b.MaxAge <= b.MinAge {
			return fmt.Errorf("policy %s: band %d: max_age must exceed min_age", p.Name, i)
		}
		for j, o := range p.Bands[:i] {
			if overlaps(b, o) {
				return fmt.Errorf("policy %s: band %d overlaps band %d", p.Name, i, j)
			}
		}
		ids := append([]string{b.Creatinine, b.CystatinC, b.Combined, b.PrimaryWhenBoth}, b.Extra...)
		for _, id := range ids {
			if id == "" {
				continue
			}
			if _, ok := reg.Latest(id); !ok {
				return fmt.Errorf("policy %s: band %d: unknown equation %q", p.Name, i, id)
			}
		}
		if b.PrimaryWhenBoth != "" && b.PrimaryWhenBoth != b.Creatinine && b.PrimaryWhenBoth != b.CystatinC && b.PrimaryWhenBoth != b.Combined {
			return fmt.Errorf("policy %s: band %d: primary_when_both must be one of the band's equations", p.Name, i)
		}
	}
	for a, r := range p.Plausible {
		if CanonicalUnit(a) == "" {
			return fmt.Errorf("policy %s: plausible: unknown analyte %q", p.Name, a)
		}
		if !(r.Min < r.Max) || r.Min < 0 {
			return fmt.Errorf("policy %s: plausible %s: min must be below max and not negative", p.Name, a)
		}
	}
	return nil
}

func overlaps(a, b Band) bool {
	aMax, bMax := a.MaxAge, b.MaxAge
	if aMax == 0 {
		aMax = 1e9
	}
	if bMax == 0 {
		bMax = 1e9
	}
	return a.MinAge < bMax && b.MinAge < aMax
}

// BandFor returns the band that applies at an age in years, as calc uses
// it (Outcome.AgeYears), and false when no band covers that age.
// Transports use it to name the equations an input may have been reported
// with, for example to withdraw them.
func (p Policy) BandFor(age float64) (Band, bool) { return p.band(age) }

func (p Policy) band(age float64) (Band, bool) {
	for _, b := range p.Bands {
		if b.contains(age) {
			return b, true
		}
	}
	return Band{}, false
}

func (p Policy) plausible(a Analyte) Range {
	if r, ok := p.Plausible[a]; ok {
		return r
	}
	return DefaultPlausible()[a]
}

func (p Policy) loinc(e Equation) (code, name string) {
	if c, ok := p.LOINC[e.ID]; ok && c != "" {
		return c, e.Name
	}
	if e.LOINC != "" {
		return e.LOINC, e.LOINCName
	}
	return p.GenericLOINC, p.GenericLOINCName
}
