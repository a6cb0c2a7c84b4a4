package calc

import (
	"fmt"
	"time"
)

// Sex is the administrative sex used by the sex-specific equation terms.
type Sex int

// Sex values. SexUnknown covers missing, unknown and any value other than
// female or male; the policy decides what happens then.
const (
	SexUnknown Sex = iota
	SexFemale
	SexMale
)

// String returns "female", "male" or "unknown".
func (s Sex) String() string {
	switch s {
	case SexFemale:
		return "female"
	case SexMale:
		return "male"
	default:
		return "unknown"
	}
}

// ParseSex maps the common codes (HL7 v2 table 0001 F/M, FHIR gender
// female/male, CSV f/m) to a Sex. Anything else is SexUnknown.
func ParseSex(s string) Sex {
	switch s {
	case "F", "f", "female", "Female", "FEMALE":
		return SexFemale
	case "M", "m", "male", "Male", "MALE":
		return SexMale
	default:
		return SexUnknown
	}
}

// Analyte names a measured quantity calc understands.
type Analyte string

// Analytes. Each has one canonical unit in which equations receive it.
const (
	Creatinine      Analyte = "creatinine"       // serum/plasma creatinine, canonical mg/dL
	CystatinC       Analyte = "cystatin_c"       // serum cystatin C, canonical mg/L
	Height          Analyte = "height"           // body height, canonical cm
	Weight          Analyte = "weight"           // body weight, canonical kg
	UrineCreatinine Analyte = "urine_creatinine" // timed urine creatinine, canonical mg/dL
	UrineVolume     Analyte = "urine_volume"     // timed urine volume, canonical mL
	CollectionTime  Analyte = "collection_time"  // urine collection duration, canonical min
)

// Measurement is one input exactly as it was received.
type Measurement struct {
	Analyte    Analyte `json:"analyte"`
	ValueText  string  `json:"value_text"`            // as received, e.g. "0.92", "<0.2"
	Unit       string  `json:"unit"`                  // as received, e.g. "mg/dL", "umol/L"
	Method     string  `json:"method,omitempty"`      // assay method code, used to match calibration rules
	Instrument string  `json:"instrument,omitempty"`  // analyser identifier, used to match calibration rules
	ReagentLot string  `json:"reagent_lot,omitempty"` // optional, used to match calibration rules
	SourceID   string  `json:"source_id,omitempty"`   // transport reference (OBX set ID, Observation id), echoed back
}

// Request is everything one calculation needs. Nothing else is consulted.
type Request struct {
	Sex Sex `json:"sex"`
	// BirthDate is the date of birth (only its calendar date counts) and
	// CollectedAt the specimen collection time; age is derived from the two.
	// Message time is never used for age.
	BirthDate   time.Time `json:"birth_date,omitzero"`
	CollectedAt time.Time `json:"collected_at,omitzero"`
	// AgeYears, when set, is used instead of BirthDate (batch verification
	// worksheets state age directly).
	AgeYears *float64 `json:"age_years,omitempty"`

	Measurements []Measurement `json:"measurements"`

	// Equation, when set, asks for one equation by ID (latest version)
	// instead of letting the policy choose.
	Equation string `json:"equation,omitempty"`

	Policy       Policy            `json:"policy"`
	Calibrations []CalibrationRule `json:"calibrations,omitempty"`

	// Pin fixes equation versions (ID → version) so that a stored request
	// recomputes with the implementation that produced it. Empty: latest.
	Pin map[string]string `json:"pin,omitempty"`
}

// Step is one intermediate term of a calculation, written so that a person
// can redo the arithmetic: Formula shows the operation with the numbers used.
type Step struct {
	Name    string  `json:"name"`
	Formula string  `json:"formula"`
	Value   float64 `json:"value"`
}

func step(name string, value float64, format string, args ...any) Step {
	return Step{Name: name, Formula: fmt.Sprintf(format, args...), Value: value}
}

// InputUse records one input as received and as used.
type InputUse struct {
	Analyte      Analyte `json:"analyte"`
	SourceID     string  `json:"source_id,omitempty"`
	ValueText    string  `json:"value_text"`
	Unit         string  `json:"unit"`
	Method       string  `json:"method,omitempty"`
	Instrument   string  `json:"instrument,omitempty"`
	ReagentLot   string  `json:"reagent_lot,omitempty"`
	Used         float64 `json:"used"`                          // after conversion and calibration
	UsedUnit     string  `json:"used_unit"`                     // canonical unit
	Calibration  string  `json:"calibration,omitempty"`         // rule ID, if a rule applied
	CalibrationV string  `json:"calibration_version,omitempty"` // rule version
	Traceable    *bool   `json:"traceable,omitempty"`           // as stated by the rule; nil when no rule
	// Accepted is true when the input passed every check and was used.
	Accepted bool   `json:"accepted"`
	Steps    []Step `json:"steps,omitempty"`
}

// Result is one computed value.
type Result struct {
	Equation        string    `json:"equation"`
	EquationVersion string    `json:"equation_version"`
	EquationName    string    `json:"equation_name"`
	LOINC           string    `json:"loinc"`
	LOINCName       string    `json:"loinc_name"`
	Primary         bool      `json:"primary"`
	Uses            []Analyte `json:"uses"`
	// Inputs lists every analyte the value was computed from, including
	// height and weight (Equation.Inputs); its status follows all of them.
	Inputs []Analyte `json:"inputs,omitempty"`
	// AssumedSex is set when the patient's sex was unknown and the policy
	// asked for both values; the result was computed as if this sex.
	AssumedSex string   `json:"assumed_sex,omitempty"`
	AgeYears   float64  `json:"age_years"`
	Steps      []Step   `json:"steps"`
	Exact      float64  `json:"exact"`
	Reported   string   `json:"reported"` // e.g. "68" or ">90"
	Capped     bool     `json:"capped,omitempty"`
	Unit       string   `json:"unit"`               // UCUM
	Category   string   `json:"category,omitempty"` // KDIGO G1..G5, indexed results only
	Comments   []string `json:"comments,omitempty"`
	// BSA and NonIndexed are filled when height and weight allow the
	// indexed result to be expressed in mL/min for drug dosing.
	BSA        float64 `json:"bsa_m2,omitempty"`
	BSAMethod  string  `json:"bsa_method,omitempty"`
	NonIndexed float64 `json:"non_indexed_ml_min,omitempty"`
	// Indexed is a clearance reported in mL/min expressed per 1.73 m² of
	// body surface area (Policy.IndexClearance).
	Indexed float64 `json:"indexed_ml_min_173,omitempty"`
}

// Refusal explains why a value was not computed.
type Refusal struct {
	Code     Reason  `json:"code"`
	Message  string  `json:"message"`
	Equation string  `json:"equation,omitempty"`
	Analyte  Analyte `json:"analyte,omitempty"`
	SourceID string  `json:"source_id,omitempty"`
}

// Outcome is everything calc decided for one request.
type Outcome struct {
	Policy        string     `json:"policy"`
	PolicyVersion string     `json:"policy_version"`
	AgeYears      *float64   `json:"age_years,omitempty"`
	AgeBasis      string     `json:"age_basis,omitempty"`
	Inputs        []InputUse `json:"inputs"`
	Results       []Result   `json:"results"`
	Refusals      []Refusal  `json:"refusals"`
}

// Units of computed results (UCUM).
const (
	UnitIndexed    = "mL/min/{1.73_m2}"
	UnitNotIndexed = "mL/min"
)

// MarshalText encodes a Sex as "female", "male" or "unknown".
func (s Sex) MarshalText() ([]byte, error) { return []byte(s.String()), nil }

// UnmarshalText decodes the forms ParseSex accepts.
func (s *Sex) UnmarshalText(b []byte) error {
	*s = ParseSex(string(b))
	return nil
}
