package fhir

import (
	"encoding/json"
	"errors"
	"net/http"
	"strings"
	"testing"
	"time"
	_ "time/tzdata" // America/New_York without depending on the host's zoneinfo

	"github.com/stretchr/testify/require"

	ppb "github.com/google/fhir/go/proto/google/fhir/proto/r4/core/resources/patient_go_proto"

	"filtrate/calc"
	"filtrate/hl7v2"
)

// Invented data only: "Northfield Valley Laboratory" and its patients do
// not exist.

func newCodec(t testing.TB) *Codec {
	t.Helper()
	c, err := NewCodec()
	require.NoError(t, err)
	return c
}

// observation returns a single Observation with a contained Patient,
// with fields replaced by kv pairs (raw JSON values).
func observation(patient string, fields map[string]string) []byte {
	base := map[string]string{
		"resourceType":      `"Observation"`,
		"id":                `"nvl-o-1"`,
		"status":            `"final"`,
		"code":              `{"coding": [{"system": "http://loinc.org", "code": "2160-0"}]}`,
		"subject":           `{"reference": "#pat"}`,
		"effectiveDateTime": `"2024-06-03T07:45:00Z"`,
		"valueQuantity":     `{"value": 1.0, "unit": "mg/dL", "system": "http://unitsofmeasure.org", "code": "mg/dL"}`,
		"contained":         `[` + patient + `]`,
	}
	for k, v := range fields {
		if v == "" {
			delete(base, k)
		} else {
			base[k] = v
		}
	}
	var b strings.Builder
	b.WriteString("{")
	first := true
	for k, v := range base {
		if !first {
			b.WriteString(",")
		}
		first = false
		b.WriteString(`"` + k + `": ` + v)
	}
	b.WriteString("}")
	return []byte(b.String())
}

const femalePatient = `{"resourceType": "Patient", "id": "pat", "identifier": [{"system": "https://northfield-valley-lab.example/mrn", "value": "NVL-200871"}], "gender": "female", "birthDate": "1974-01-15"}`

// patient returns a contained Patient "pat" with an invented identifier
// (mrn), gender and birthDate.
func patient(mrn, gender, birthDate string) string {
	return `{"resourceType": "Patient", "id": "pat", "identifier": [{"system": "https://northfield-valley-lab.example/mrn", "value": "` + mrn +
		`"}], "gender": "` + gender + `", "birthDate": "` + birthDate + `"}`
}

func testCodes(t *testing.T) *hl7v2.CodeMap {
	t.Helper()
	m, err := hl7v2.NewCodeMap(append(hl7v2.DefaultCodeEntries(),
		hl7v2.CodeEntry{System: "https://northfield-valley-lab.example/codes", Code: "CREA", Analyte: calc.Creatinine, Unit: "umol/L"},
		hl7v2.CodeEntry{Code: "CYSC", Analyte: calc.CystatinC},
	)...)
	require.NoError(t, err)
	return m
}

func extract(t *testing.T, body []byte, at Endpoint) *Extraction {
	t.Helper()
	req, err := newCodec(t).Decode(body, at)
	require.NoError(t, err)
	x, err := req.Extract(ExtractOptions{Codes: testCodes(t)})
	require.NoError(t, err)
	return x
}

// TestExtractObservation checks how each element of an input Observation
// reaches the calculation request.
func TestExtractObservation(t *testing.T) {
	cases := []struct {
		name    string
		fields  map[string]string
		patient string
		check   func(t *testing.T, x *Extraction)
	}{
		{
			name: "comparator makes the value censored", // FHIR R4 Quantity.comparator
			fields: map[string]string{
				"valueQuantity": `{"value": 0.2, "comparator": "<=", "unit": "mg/dL", "system": "http://unitsofmeasure.org", "code": "mg/dL"}`,
			},
			check: func(t *testing.T, x *Extraction) {
				require.Equal(t, "<=0.2", x.Inputs[0].Measurement.ValueText)
			},
		},
		{
			name:   "decimal digits kept as written",
			fields: map[string]string{"valueQuantity": `{"value": 1.20, "code": "mg/dL"}`},
			check: func(t *testing.T, x *Extraction) {
				require.Equal(t, "1.20", x.Inputs[0].Measurement.ValueText)
				require.Equal(t, "mg/dL", x.Inputs[0].Measurement.Unit)
			},
		},
		{
			name:   "unit falls back to Quantity.unit",
			fields: map[string]string{"valueQuantity": `{"value": 88, "unit": "µmol/L"}`},
			check: func(t *testing.T, x *Extraction) {
				require.Equal(t, "µmol/L", x.Inputs[0].Measurement.Unit)
			},
		},
		{
			name: "unit falls back to the code map entry",
			fields: map[string]string{
				"code":          `{"coding": [{"system": "https://northfield-valley-lab.example/codes", "code": "CREA"}]}`,
				"valueQuantity": `{"value": 88}`,
			},
			check: func(t *testing.T, x *Extraction) {
				require.Equal(t, calc.Creatinine, x.Inputs[0].Analyte)
				require.Equal(t, "umol/L", x.Inputs[0].Measurement.Unit)
			},
		},
		{
			name: "any-system local code",
			fields: map[string]string{
				"code":          `{"coding": [{"system": "urn:oid:2.16.840.1.113883.19.5", "code": "CYSC"}]}`,
				"valueQuantity": `{"value": 0.9, "code": "mg/L"}`,
			},
			check: func(t *testing.T, x *Extraction) {
				require.Equal(t, calc.CystatinC, x.Inputs[0].Analyte)
			},
		},
		{
			name:   "a LOINC code in another system is not LOINC",
			fields: map[string]string{"code": `{"coding": [{"system": "urn:oid:2.16.840.1.113883.19.5", "code": "2160-0"}]}`},
			check: func(t *testing.T, x *Extraction) {
				require.Empty(t, x.Inputs)
				require.Empty(t, x.Groups)
			},
		},
		{
			name:   "second coding recognised",
			fields: map[string]string{"code": `{"coding": [{"system": "urn:local", "code": "X1"}, {"system": "http://loinc.org", "code": "14682-9"}]}`},
			check: func(t *testing.T, x *Extraction) {
				require.Equal(t, calc.Creatinine, x.Inputs[0].Analyte) // LOINC 14682-9: creatinine, moles/volume
			},
		},
		{
			name:   "valueString passed as text",
			fields: map[string]string{"valueQuantity": "", "valueString": `"<0.2"`},
			check: func(t *testing.T, x *Extraction) {
				require.Equal(t, "<0.2", x.Inputs[0].Measurement.ValueText)
			},
		},
		{
			name:   "effectivePeriod.start is the collection time",
			fields: map[string]string{"effectiveDateTime": "", "effectivePeriod": `{"start": "2024-06-03T07:45:00+02:00", "end": "2024-06-03T08:00:00+02:00"}`},
			check: func(t *testing.T, x *Extraction) {
				require.True(t, time.Date(2024, 6, 3, 5, 45, 0, 0, time.UTC).Equal(x.Groups[0].CollectedAt))
				_, off := x.Groups[0].CollectedAt.Zone()
				require.Equal(t, 7200, off, "collection time keeps its own offset for the calendar date")
			},
		},
		{
			name:   "effectiveInstant",
			fields: map[string]string{"effectiveDateTime": "", "effectiveInstant": `"2024-06-03T07:45:00.250Z"`},
			check: func(t *testing.T, x *Extraction) {
				require.True(t, time.Date(2024, 6, 3, 7, 45, 0, 250e6, time.UTC).Equal(x.Groups[0].CollectedAt))
			},
		},
		{
			name:   "date-only collection keeps its calendar date",
			fields: map[string]string{"effectiveDateTime": `"2024-06-03"`},
			check: func(t *testing.T, x *Extraction) {
				y, m, d := x.Groups[0].CollectedAt.Date()
				require.Equal(t, []int{2024, 6, 3}, []int{y, int(m), d})
			},
		},
		{
			name:   "month precision is not a collection date",
			fields: map[string]string{"effectiveDateTime": `"2024-06"`},
			check: func(t *testing.T, x *Extraction) {
				require.True(t, x.Groups[0].CollectedAt.IsZero())
				require.True(t, x.Groups[0].Request.CollectedAt.IsZero())
			},
		},
		{
			name:    "partial birth date is not used",
			patient: patient("NVL-200872", "male", "1974-01"),
			check: func(t *testing.T, x *Extraction) {
				p := x.Groups[0].Patient
				require.Equal(t, "1974-01", p.BirthDateText)
				require.True(t, p.BirthDate.IsZero())
				require.Equal(t, calc.SexMale, p.Sex)
				require.Equal(t, "https://northfield-valley-lab.example/mrn|NVL-200872", p.ID)
			},
		},
		{
			name:    "gender other is unknown",
			patient: patient("NVL-200873", "other", "1974-01-15"),
			check: func(t *testing.T, x *Extraction) {
				p := x.Groups[0].Patient
				require.Equal(t, "other", p.Gender)
				require.Equal(t, calc.SexUnknown, p.Sex)
				require.Equal(t, time.Date(1974, 1, 15, 0, 0, 0, 0, time.UTC), p.BirthDate)
			},
		},
		{
			name: "method and device for calibration rules",
			fields: map[string]string{
				"method": `{"coding": [{"system": "https://northfield-valley-lab.example/methods", "code": "ENZ"}]}`,
				"device": `{"identifier": {"value": "NV-CHEM-02"}, "display": "Chemistry analyser 2"}`,
			},
			check: func(t *testing.T, x *Extraction) {
				m := x.Inputs[0].Measurement
				require.Equal(t, "ENZ", m.Method)
				require.Equal(t, "NV-CHEM-02", m.Instrument)
				require.Equal(t, "nvl-o-1", m.SourceID)
			},
		},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			p := tc.patient
			if p == "" {
				p = femalePatient
			}
			tc.check(t, extract(t, observation(p, tc.fields), EndpointObservation))
		})
	}
}

// TestClassifyStatus: FHIR R4 ObservationStatus codes.
func TestClassifyStatus(t *testing.T) {
	for s, want := range map[string]StatusAction{
		"final": hl7v2.StatusCompute, "amended": hl7v2.StatusCompute, "corrected": hl7v2.StatusCompute,
		"preliminary": hl7v2.StatusCompute, "cancelled": hl7v2.StatusCancel, "entered-in-error": hl7v2.StatusRetract,
		"registered": hl7v2.StatusPending, "unknown": hl7v2.StatusUnknown, "": hl7v2.StatusUnknown,
	} {
		require.Equal(t, want, ClassifyStatus(s), s)
	}
}

// TestGrouping: one calculation per patient and collection time; height
// and weight borrowed from the same patient's other times.
func TestGrouping(t *testing.T) {
	body := []byte(`{"resourceType": "Bundle", "type": "collection", "entry": [
	 {"fullUrl": "urn:uuid:00000000-0000-4000-8000-0000000000a1", "resource": {"resourceType": "Patient", "gender": "male", "birthDate": "1964-02-10",
	   "identifier": [{"system": "https://northfield-valley-lab.example/mrn", "value": "NVL-1"}]}},
	 {"fullUrl": "urn:uuid:00000000-0000-4000-8000-0000000000b1", "resource": {"resourceType": "Patient", "gender": "female", "birthDate": "1974-01-15",
	   "identifier": [{"system": "https://northfield-valley-lab.example/mrn", "value": "NVL-2"}]}},
	 {"resource": {"resourceType": "Observation", "id": "a-cr-1", "status": "final", "code": {"coding": [{"system": "http://loinc.org", "code": "2160-0"}]},
	   "subject": {"reference": "urn:uuid:00000000-0000-4000-8000-0000000000a1"}, "effectiveDateTime": "2024-03-05T08:30:00Z", "valueQuantity": {"value": 1.4, "code": "mg/dL"}}},
	 {"resource": {"resourceType": "Observation", "id": "a-cys-1", "status": "final", "code": {"coding": [{"system": "http://loinc.org", "code": "33863-2"}]},
	   "subject": {"reference": "urn:uuid:00000000-0000-4000-8000-0000000000a1"}, "effectiveDateTime": "2024-03-05T08:30:00Z", "valueQuantity": {"value": 0.8, "code": "mg/L"}}},
	 {"resource": {"resourceType": "Observation", "id": "a-cr-2", "status": "final", "code": {"coding": [{"system": "http://loinc.org", "code": "2160-0"}]},
	   "subject": {"reference": "urn:uuid:00000000-0000-4000-8000-0000000000a1"}, "effectiveDateTime": "2024-03-06T08:30:00Z", "valueQuantity": {"value": 1.5, "code": "mg/dL"}}},
	 {"resource": {"resourceType": "Observation", "id": "a-wt", "status": "final", "code": {"coding": [{"system": "http://loinc.org", "code": "29463-7"}]},
	   "subject": {"reference": "urn:uuid:00000000-0000-4000-8000-0000000000a1"}, "effectiveDateTime": "2024-03-01", "valueQuantity": {"value": 82, "code": "kg"}}},
	 {"resource": {"resourceType": "Observation", "id": "b-cr-1", "status": "final", "code": {"coding": [{"system": "http://loinc.org", "code": "2160-0"}]},
	   "subject": {"reference": "urn:uuid:00000000-0000-4000-8000-0000000000b1"}, "effectiveDateTime": "2024-03-05T08:30:00Z", "valueQuantity": {"value": 0.9, "code": "mg/dL"}}}
	]}`)
	x := extract(t, body, EndpointBundle)
	require.Len(t, x.Groups, 3)
	sources := func(g *Group) []string {
		var s []string
		for _, m := range g.Request.Measurements {
			s = append(s, m.SourceID)
		}
		return s
	}
	require.Equal(t, []string{"a-cr-1", "a-cys-1", "a-wt"}, sources(x.Groups[0]))
	require.Equal(t, []string{"a-cr-2", "a-wt"}, sources(x.Groups[1]))
	require.Equal(t, []string{"b-cr-1"}, sources(x.Groups[2]))
	require.Equal(t, "https://northfield-valley-lab.example/mrn|NVL-1", x.Groups[0].Patient.ID)
	require.Same(t, x.Groups[0].Patient, x.Groups[1].Patient)
	require.Equal(t, calc.SexFemale, x.Groups[2].Request.Sex)
}

// TestOutputs builds answers for policies that cap values and report both
// sexes, and validates everything with google/fhir/go.
func TestOutputs(t *testing.T) {
	c := newCodec(t)
	cl := calc.NewCalculator(calc.Builtin())
	eval := func(x *Extraction, pol calc.Policy) []GroupResult {
		var res []GroupResult
		for _, g := range x.Groups {
			r := g.Request
			r.Policy = pol
			res = append(res, GroupResult{Outcome: cl.Evaluate(r), RecordIDs: []int64{41, 42}})
		}
		return res
	}
	meta := Meta{Now: time.Date(2024, 7, 1, 12, 0, 0, 0, time.UTC), SoftwareVersion: "test", ConfigHash: "h"}

	t.Run("capped value has comparator >", func(t *testing.T) {
		pol, err := calc.Preset("nice-2021") // reports values above 90 as ">90"
		require.NoError(t, err)
		// female 40 y, 0.8 mg/dL: CKD-EPI 2009 (Levey 2009, without the
		// race coefficient) 141 × (0.8/0.7)^−1.209 × 0.993^40 × 1.018 =
		// 92.2 (hand computation), above the cap.
		x := extract(t, observation(patient("NVL-200874", "female", "1984-01-15"),
			map[string]string{"valueQuantity": `{"value": 0.8, "code": "mg/dL"}`}), EndpointObservation)
		res := eval(x, pol)
		require.Len(t, res[0].Outcome.Results, 1)
		require.InDelta(t, 92.2, res[0].Outcome.Results[0].Exact, 0.05)
		require.True(t, res[0].Outcome.Results[0].Capped)
		body, err := c.Response(x, res, meta)
		require.NoError(t, err)
		require.NoError(t, c.Validate(body))
		require.Contains(t, string(body), `"valueQuantity":{"code":"mL/min/{1.73_m2}","comparator":">","system":"http://unitsofmeasure.org","unit":"mL/min/{1.73_m2}","value":90}`)
	})
	t.Run("sex unknown, both values", func(t *testing.T) {
		pol, err := calc.Preset("nkf-asn-2021")
		require.NoError(t, err)
		pol.SexUnknown = calc.SexRuleBoth
		x := extract(t, observation(patient("NVL-200875", "unknown", "1974-01-15"), nil), EndpointObservation)
		res := eval(x, pol)
		require.Len(t, res[0].Outcome.Results, 2)
		body, err := c.Response(x, res, meta)
		require.NoError(t, err)
		require.NoError(t, c.Validate(body))
		var b struct {
			Entry []struct {
				Resource struct {
					ResourceType, ID string
					Code             struct{ Text string }
				}
			}
		}
		require.NoError(t, json.Unmarshal(body, &b))
		var texts, ids []string
		for _, e := range b.Entry {
			if e.Resource.ResourceType == "Observation" {
				texts = append(texts, e.Resource.Code.Text)
				ids = append(ids, e.Resource.ID)
			}
		}
		require.Equal(t, []string{"eGFR (CKD-EPI 2021 creatinine), calculated as if female", "eGFR (CKD-EPI 2021 creatinine), calculated as if male"}, texts)
		require.NotEqual(t, ids[0], ids[1])
		_, fw, err := c.Forward(x, res, meta)
		require.NoError(t, err)
		require.NoError(t, c.Validate(fw))
	})
	t.Run("outcomes must match groups", func(t *testing.T) {
		x := extract(t, observation(femalePatient, nil), EndpointObservation)
		_, err := c.Response(x, nil, meta)
		require.Error(t, err)
	})
}

// TestLookupPatient: a subject Patient/[id] not in the request is looked
// up; not found is the request's fault, a failing source is not.
func TestLookupPatient(t *testing.T) {
	c := newCodec(t)
	body := observation(femalePatient, map[string]string{"subject": `{"reference": "Patient/nvl-p-7"}`, "contained": ""})
	req, err := c.Decode(body, EndpointObservation)
	require.NoError(t, err)
	pt, err := c.DecodePatient([]byte(`{"resourceType": "Patient", "id": "nvl-p-7", "gender": "male", "birthDate": "1964-02-10",
		"identifier": [{"system": "https://northfield-valley-lab.example/mrn", "value": "NVL-700007"}]}`))
	require.NoError(t, err)
	calls := 0
	x, err := req.Extract(ExtractOptions{LookupPatient: func(id string) (*ppb.Patient, error) {
		calls++
		require.Equal(t, "nvl-p-7", id)
		return pt, nil
	}})
	require.NoError(t, err)
	require.Equal(t, 1, calls)
	require.Equal(t, calc.SexMale, x.Groups[0].Request.Sex)
	require.Equal(t, "https://northfield-valley-lab.example/mrn|NVL-700007", x.Groups[0].Patient.ID)

	_, err = req.Extract(ExtractOptions{LookupPatient: func(string) (*ppb.Patient, error) { return nil, ErrPatientNotFound }})
	var ie *InputError
	require.ErrorAs(t, err, &ie)
	require.Equal(t, http.StatusUnprocessableEntity, ie.Status)

	_, err = req.Extract(ExtractOptions{LookupPatient: func(string) (*ppb.Patient, error) { return nil, errors.New("source down") }})
	var le *LookupError
	require.ErrorAs(t, err, &le)
	require.False(t, errors.As(err, &ie))

	_, err = c.DecodePatient([]byte(`{"resourceType": "Observation", "status": "final", "code": {"text": "x"}}`))
	require.ErrorAs(t, err, &ie)
}

func TestIsDecimal(t *testing.T) {
	// FHIR R4 datatypes: decimal regex -?(0|[1-9][0-9]*)(\.[0-9]+)?([eE][+-]?[0-9]+)?
	for s, want := range map[string]bool{
		"0": true, "68": true, "90": true, "0.5": true, "-1.25": true, "1e3": true, "1.5E-2": true,
		"": false, "01": false, ".5": false, "5.": false, ">90": false, "1e": false, "abc": false, "1.2.3": false,
	} {
		require.Equal(t, want, isDecimal(s), s)
	}
}

func TestSplitComparator(t *testing.T) {
	for in, want := range map[string][2]string{
		">90": {">", "90"}, ">=15": {">=", "15"}, "<0.2": {"<", "0.2"}, "<=3": {"<=", "3"}, "68": {"", "68"},
	} {
		c, n := splitComparator(in)
		require.Equal(t, want, [2]string{c, n}, in)
	}
}

func TestFHIRPath(t *testing.T) {
	for in, want := range map[string]string{
		"Bundle.entry[0].resource.Observation.valueQuantity.value":            "Bundle.entry[0].resource.valueQuantity.value",
		"Bundle.entry[2].resource.Observation.contained[0].Patient.birthDate": "Bundle.entry[2].resource.contained[0].birthDate",
		"Bundle.entry[1].resource.Patient":                                    "Bundle.entry[1].resource",
		"Observation.status":                                                  "Observation.status",
	} {
		require.Equal(t, want, fhirPath(in), in)
	}
}

func TestUUIDFrom(t *testing.T) {
	u := uuidFrom("x")
	require.Regexp(t, `^[0-9a-f]{8}-[0-9a-f]{4}-8[0-9a-f]{3}-[89ab][0-9a-f]{3}-[0-9a-f]{12}$`, u) // RFC 9562 version 8, variant 10
	require.Equal(t, u, uuidFrom("x"))
	require.NotEqual(t, u, uuidFrom("y"))
}

func TestCapabilityStatement(t *testing.T) {
	c := newCodec(t)
	body, err := c.CapabilityStatement(Capabilities{
		Version: "test", Site: "Northfield Valley Laboratory", Date: time.Date(2024, 7, 1, 0, 0, 0, 0, time.UTC),
		Codes:   append(hl7v2.DefaultCodeEntries(), hl7v2.CodeEntry{System: "https://northfield-valley-lab.example/codes", Code: "CREA", Analyte: calc.Creatinine}),
		Outputs: []calc.Result{{Equation: "ckd-epi-2021-cr", EquationName: "CKD-EPI 2021 creatinine", LOINC: "98979-8"}},
	})
	require.NoError(t, err)
	require.NoError(t, c.Validate(body))
	s := string(body)
	for _, want := range []string{`"kind":"instance"`, `"fhirVersion":"4.0.1"`, `"code":"create"`, `"code":"transaction"`,
		"2160-0 (creatinine)", "33863-2 (cystatin_c)", "CREA in https://northfield-valley-lab.example/codes", "98979-8",
		"Patient.identifier (system and value, required)"} {
		require.Contains(t, s, want)
	}
	// The patient identity requirement is stated where a sender reads the
	// server's rules (rest.documentation), with the status of a refusal
	// (HTTP 422, as Extract answers; FHIR R4 http.html: 422 Unprocessable
	// Entity for a resource that violates the server's business rules).
	var cs struct {
		Rest []struct{ Documentation string } `json:"rest"`
	}
	require.NoError(t, json.Unmarshal(body, &cs))
	require.Len(t, cs.Rest, 1)
	for _, want := range []string{"Patient.identifier with both system and value is required", "refused with HTTP 422"} {
		require.Contains(t, cs.Rest[0].Documentation, want)
	}
}

// TestPatientIdentifierRequired: the ids of eGFR Observations derive from
// the patient's identity, so an input whose Patient has no identifier with
// system and value is refused (422) with an OperationOutcome naming
// Patient.identifier, wherever the Patient comes from.
func TestPatientIdentifierRequired(t *testing.T) {
	c := newCodec(t)
	noID := `{"resourceType": "Patient", "id": "pat", "gender": "female", "birthDate": "1974-01-15"}`
	valueOnly := `{"resourceType": "Patient", "id": "pat", "identifier": [{"value": "NVL-200876"}], "gender": "female", "birthDate": "1974-01-15"}`
	bundle := `{"resourceType": "Bundle", "type": "collection", "entry": [
	 {"fullUrl": "urn:uuid:00000000-0000-4000-8000-0000000000c1", "resource": {"resourceType": "Patient", "gender": "male", "birthDate": "1964-02-10"}},
	 {"resource": {"resourceType": "Observation", "status": "final", "code": {"coding": [{"system": "http://loinc.org", "code": "2160-0"}]},
	   "subject": {"reference": "urn:uuid:00000000-0000-4000-8000-0000000000c1"}, "effectiveDateTime": "2024-03-05T08:30:00Z", "valueQuantity": {"value": 1.4, "code": "mg/dL"}}}]}`
	lookedUp, err := c.DecodePatient([]byte(`{"resourceType": "Patient", "id": "nvl-p-8", "gender": "male", "birthDate": "1964-02-10"}`))
	require.NoError(t, err)
	cases := []struct {
		name   string
		body   []byte
		at     Endpoint
		lookup func(string) (*ppb.Patient, error)
		expr   string
	}{
		{"contained, no identifier", observation(noID, nil), EndpointObservation, nil, "Observation.contained[0].identifier"},
		{"contained, identifier without system", observation(valueOnly, nil), EndpointObservation, nil, "Observation.contained[0].identifier"},
		{"Bundle entry, no identifier", []byte(bundle), EndpointBundle, nil, "Bundle.entry[0].resource.identifier"},
		{"patient source, no identifier",
			observation(femalePatient, map[string]string{"subject": `{"reference": "Patient/nvl-p-8"}`, "contained": ""}), EndpointObservation,
			func(string) (*ppb.Patient, error) { return lookedUp, nil }, "Observation.subject"},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			req, err := c.Decode(tc.body, tc.at)
			require.NoError(t, err)
			_, err = req.Extract(ExtractOptions{LookupPatient: tc.lookup})
			var ie *InputError
			require.ErrorAs(t, err, &ie)
			require.Equal(t, http.StatusUnprocessableEntity, ie.Status)
			require.Equal(t, []string{tc.expr}, ie.Issues[0].Expression)
			require.Contains(t, ie.Issues[0].Details, "Patient.identifier")
			body, err := c.OperationOutcome(ie.Issues)
			require.NoError(t, err)
			require.NoError(t, c.Validate(body))
		})
	}
}

// TestResultIDsDifferByPatient: two requests whose contained Patients share
// the local id "pat" but not their identifier get different eGFR ids, so
// one patient's eGFR can never replace or withdraw the other's.
func TestResultIDsDifferByPatient(t *testing.T) {
	a := extract(t, observation(patient("NVL-200877", "female", "1974-01-15"), nil), EndpointObservation)
	b := extract(t, observation(patient("NVL-200878", "female", "1974-01-15"), nil), EndpointObservation)
	ids := func(x *Extraction) []string { return identities(x.Inputs, []calc.Analyte{calc.Creatinine}) }
	require.NotEqual(t, resultID(a.Groups[0], "ckd-epi-2021-cr", "", ids(a)), resultID(b.Groups[0], "ckd-epi-2021-cr", "", ids(b)))
	again := extract(t, observation(patient("NVL-200877", "female", "1974-01-15"), map[string]string{"status": `"corrected"`}), EndpointObservation)
	require.Equal(t, resultID(a.Groups[0], "ckd-epi-2021-cr", "", ids(a)), resultID(again.Groups[0], "ckd-epi-2021-cr", "", ids(again)))
}

// TestCollectionTimeInLaboratoryZone: effective times are read in the
// laboratory's zone before age is computed (calc.AgeAt counts calendar
// dates in the collection time's own location).
func TestCollectionTimeInLaboratoryZone(t *testing.T) {
	ny, err := time.LoadLocation("America/New_York")
	require.NoError(t, err)
	c := newCodec(t)
	cases := []struct {
		name, effective string
		loc             *time.Location
		wantDate        string
	}{
		// 2024-03-16T01:00Z is 2024-03-15 21:00 in New York (UTC−4 from
		// 10 March 2024, US daylight saving time: common knowledge).
		{"instant in New York", `"2024-03-16T01:00:00Z"`, ny, "2024-03-15"},
		{"instant, no zone configured keeps its offset", `"2024-03-16T01:00:00Z"`, nil, "2024-03-16"},
		{"date alone stays that date", `"2024-03-16"`, ny, "2024-03-16"},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			req, err := c.Decode(observation(patient("NVL-200879", "male", "2006-03-16"), map[string]string{"effectiveDateTime": tc.effective}), EndpointObservation)
			require.NoError(t, err)
			x, err := req.Extract(ExtractOptions{Location: tc.loc})
			require.NoError(t, err)
			got := x.Groups[0].Request.CollectedAt
			require.Equal(t, tc.wantDate, got.Format("2006-01-02"))
			if tc.loc != nil {
				require.Equal(t, tc.loc, got.Location())
			}
		})
	}
}

// TestWithdrawalOutputs: a withdrawal is written with the id its result was
// written to (same patient, collection time, equation and assumed sex),
// the status it is given (FHIR R4 ObservationStatus) and no value.
func TestWithdrawalOutputs(t *testing.T) {
	c := newCodec(t)
	cl := calc.NewCalculator(calc.Builtin())
	pol, err := calc.Preset("nkf-asn-2021")
	require.NoError(t, err)
	pol.SexUnknown = calc.SexRuleBoth
	meta := Meta{Now: time.Date(2024, 7, 1, 12, 0, 0, 0, time.UTC), SoftwareVersion: "test", ConfigHash: "h"}
	pat := patient("NVL-200880", "unknown", "1974-01-15")

	type obs struct{ ID, Status, Text string }
	observations := func(body []byte) []obs {
		var b struct {
			Entry []struct {
				Resource struct {
					ResourceType, ID, Status string
					Code                     struct{ Text string }
					ValueQuantity            any
				}
			}
		}
		require.NoError(t, json.Unmarshal(body, &b))
		var out []obs
		for _, e := range b.Entry {
			if e.Resource.ResourceType == "Observation" {
				out = append(out, obs{e.Resource.ID, e.Resource.Status, e.Resource.Code.Text})
				if e.Resource.Status != "final" {
					require.Nil(t, e.Resource.ValueQuantity, "a withdrawal has no value")
				}
			}
		}
		return out
	}

	// The results, as calculated as if female and as if male.
	x := extract(t, observation(pat, nil), EndpointObservation)
	r := x.Groups[0].Request
	r.Policy = pol
	body, err := c.Response(x, []GroupResult{{Outcome: cl.Evaluate(r)}}, meta)
	require.NoError(t, err)
	results := observations(body)
	require.Len(t, results, 2)

	// The same creatinine, entered in error: the caller withdraws both.
	x = extract(t, observation(pat, map[string]string{"status": `"entered-in-error"`}), EndpointObservation)
	w := Withdrawal{SourceID: "nvl-o-1", Equation: "ckd-epi-2021-cr", EquationName: "CKD-EPI 2021 creatinine",
		LOINC: "98979-8", Unit: calc.UnitIndexed, Status: "entered-in-error"}
	wf, wm := w, w
	wf.AssumedSex, wm.AssumedSex = "female", "male"
	body, err = c.Response(x, []GroupResult{{Withdrawals: []Withdrawal{wf, wm}}}, meta)
	require.NoError(t, err)
	require.NoError(t, c.Validate(body))
	withdrawn := observations(body)
	require.Equal(t, []obs{
		{results[0].ID, "entered-in-error", results[0].Text},
		{results[1].ID, "entered-in-error", results[1].Text},
	}, withdrawn)
	require.Contains(t, string(body), noteEnteredInError)
	require.Contains(t, string(body), `"derivedFrom":[{"reference":"Observation/nvl-o-1"}]`)

	// Cancelled.
	wc := w
	wc.Status = "cancelled"
	body, err = c.Response(x, []GroupResult{{Withdrawals: []Withdrawal{wc}}}, meta)
	require.NoError(t, err)
	require.NoError(t, c.Validate(body))
	require.Equal(t, "cancelled", observations(body)[0].Status)
	require.Contains(t, string(body), noteCancelled)

	// A status that does not withdraw is a programming error.
	wc.Status = "final"
	_, err = c.Response(x, []GroupResult{{Withdrawals: []Withdrawal{wc}}}, meta)
	require.Error(t, err)
}

// TestDedupKey: the identical bytes are the same request; a reused
// Bundle.identifier with other content is not.
func TestDedupKey(t *testing.T) {
	c := newCodec(t)
	body := func(value string) []byte {
		return []byte(`{"resourceType": "Bundle", "type": "collection",
		  "identifier": {"system": "https://northfield-valley-lab.example/lis/bundle", "value": "NVL-B-0100"},
		  "entry": [{"fullUrl": "urn:uuid:00000000-0000-4000-8000-0000000000d1", "resource": {"resourceType": "Observation", "status": "final",
		    "code": {"coding": [{"system": "http://loinc.org", "code": "2951-2"}]}, "valueQuantity": {"value": ` + value + `, "code": "mmol/L"}}}]}`)
	}
	key := func(b []byte) string {
		req, err := c.Decode(b, EndpointBundle)
		require.NoError(t, err)
		return req.DedupKey()
	}
	first := key(body("140"))
	require.Equal(t, first, key(body("140")))
	require.NotEqual(t, first, key(body("141")))
	require.True(t, strings.HasPrefix(first, "fhir|https://northfield-valley-lab.example/lis/bundle|NVL-B-0100|"), first)
}
