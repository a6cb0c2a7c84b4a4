package fhir

import (
	"encoding/json"
	"net/url"
	"strings"
	"testing"
	"time"

	"github.com/stretchr/testify/require"

	dpb "github.com/google/fhir/go/proto/google/fhir/proto/r4/core/datatypes_go_proto"

	"filtrate/calc"
)

// Invented data only: "Northfield Valley Laboratory", its systems and its
// patients do not exist.

const (
	sysMRN    = "https://northfield-valley-lab.example/mrn"
	sysLISPat = "https://northfield-valley-lab.example/lis/patient"
	sysResult = "https://northfield-valley-lab.example/lis/result"
)

// identifiers writes a JSON array of identifiers from system, value pairs.
func identifiers(pairs ...string) string {
	var parts []string
	for i := 0; i+1 < len(pairs); i += 2 {
		parts = append(parts, `{"system": "`+pairs[i]+`", "value": "`+pairs[i+1]+`"}`)
	}
	return "[" + strings.Join(parts, ", ") + "]"
}

// specimenBundle is a collection Bundle with one Patient (fullUrl
// urn:uuid:...f1, the given identifiers, male, born 1964-02-10) and the
// given Observation resources (JSON objects without subject, which is
// added).
func specimenBundle(patientIDs string, observations ...string) []byte {
	var b strings.Builder
	b.WriteString(`{"resourceType": "Bundle", "type": "collection", "entry": [
	 {"fullUrl": "urn:uuid:00000000-0000-4000-8000-0000000000f1", "resource": {"resourceType": "Patient",
	   "identifier": ` + patientIDs + `, "gender": "male", "birthDate": "1964-02-10"}}`)
	for _, o := range observations {
		b.WriteString(`, {"resource": ` + strings.Replace(o, `{`, `{"subject": {"reference": "urn:uuid:00000000-0000-4000-8000-0000000000f1"}, `, 1) + `}`)
	}
	b.WriteString("]}")
	return []byte(b.String())
}

// creatinine is a creatinine Observation (LOINC 2160-0) with the given
// extra members (identifier, id, status...), collected on 2024-03-05
// (a date without a time), 1.4 mg/dL.
func creatinine(members string) string {
	return `{"resourceType": "Observation", ` + members + `, "code": {"coding": [{"system": "http://loinc.org", "code": "2160-0"}]},
	  "effectiveDateTime": "2024-03-05", "valueQuantity": {"value": 1.4, "code": "mg/dL"}}`
}

func TestStableIdentifier(t *testing.T) {
	id := func(sys, v string) *dpb.Identifier {
		x := &dpb.Identifier{}
		if sys != "" {
			x.System = uri(sys)
		}
		if v != "" {
			x.Value = str(v)
		}
		return x
	}
	cases := []struct {
		name      string
		ids       []*dpb.Identifier
		sys, v    string
		wantFound bool
	}{
		{"none", nil, "", "", false},
		{"one", []*dpb.Identifier{id(sysMRN, "A1")}, sysMRN, "A1", true},
		{"smallest system|value first", []*dpb.Identifier{id(sysLISPat, "P1"), id(sysMRN, "A1")}, sysLISPat, "P1", true},
		{"smallest system|value second", []*dpb.Identifier{id(sysMRN, "A1"), id(sysLISPat, "P1")}, sysLISPat, "P1", true},
		{"same system: smallest value", []*dpb.Identifier{id(sysMRN, "B2"), id(sysMRN, "B10")}, sysMRN, "B10", true},
		{"without system ignored", []*dpb.Identifier{id("", "0000"), id(sysMRN, "A1")}, sysMRN, "A1", true},
		{"without value ignored", []*dpb.Identifier{id(sysLISPat, ""), id(sysMRN, "A1")}, sysMRN, "A1", true},
		{"only incomplete", []*dpb.Identifier{id("", "0000"), id(sysMRN, "")}, "", "", false},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			sys, v, ok := stableIdentifier(tc.ids)
			require.Equal(t, tc.wantFound, ok)
			require.Equal(t, tc.sys, sys)
			require.Equal(t, tc.v, v)
		})
	}
}

// TestPatientIDIgnoresIdentifierOrder: the patient key (and so the eGFR
// ids) does not depend on the order of Patient.identifier.
func TestPatientIDIgnoresIdentifierOrder(t *testing.T) {
	obs := creatinine(`"id": "nvl-o-1", "status": "final"`)
	cases := []struct {
		name, ids string
	}{
		{"MRN first", identifiers(sysMRN, "NVL-100301", sysLISPat, "P-77")},
		{"MRN last", identifiers(sysLISPat, "P-77", sysMRN, "NVL-100301")},
		{"with an incomplete identifier", `[{"value": "X-1"}, ` + strings.Trim(identifiers(sysMRN, "NVL-100301", sysLISPat, "P-77"), "[]") + `]`},
	}
	var first string
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			x := extract(t, specimenBundle(tc.ids, obs), EndpointBundle)
			require.Equal(t, sysLISPat+"|P-77", x.Groups[0].Patient.ID)
			id := resultID(x.Groups[0], "ckd-epi-2021-cr", "", identities(x.Inputs, []calc.Analyte{calc.Creatinine}))
			if first == "" {
				first = id
			}
			require.Equal(t, first, id)
		})
	}
}

// TestObservationIdentity: identifier (the smallest system|value), else
// logical id, else fullUrl, else none.
func TestObservationIdentity(t *testing.T) {
	cases := []struct {
		name, fullURL, members, want string
	}{
		{"identifier before id", "", `, "id": "nvl-o-9", "identifier": ` + identifiers(sysResult, "R-2", sysResult, "R-10"), sysResult + "|R-10"},
		{"identifier without system is not one", "", `, "id": "nvl-o-9", "identifier": [{"value": "R-3"}]`, "Observation/nvl-o-9"},
		{"logical id", "urn:uuid:00000000-0000-4000-8000-0000000000f9", `, "id": "nvl-o-9"`, "Observation/nvl-o-9"},
		{"fullUrl", "urn:uuid:00000000-0000-4000-8000-0000000000f9", "", "urn:uuid:00000000-0000-4000-8000-0000000000f9"},
		{"nothing", "", "", ""},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			body := specimenBundle(identifiers(sysMRN, "NVL-100302"), creatinine(`"status": "final"`+tc.members))
			if tc.fullURL != "" {
				body = []byte(strings.Replace(string(body), `{"resource": {"subject"`, `{"fullUrl": "`+tc.fullURL+`", "resource": {"subject"`, 1))
			}
			x := extract(t, body, EndpointBundle)
			require.Len(t, x.Inputs, 1)
			require.Equal(t, tc.want, x.Inputs[0].identity)
		})
	}
}

// eGFRs is the id and status of each computed or withdrawn Observation of
// an answer, in order.
func eGFRs(t *testing.T, body []byte) [][2]string {
	t.Helper()
	var b struct {
		Entry []struct {
			Resource struct {
				ResourceType, ID, Status string
				DerivedFrom              []struct{ Reference string }
			}
		}
	}
	require.NoError(t, json.Unmarshal(body, &b))
	var out [][2]string
	for _, e := range b.Entry {
		if e.Resource.ResourceType == "Observation" {
			out = append(out, [2]string{e.Resource.ID, e.Resource.Status})
		}
	}
	return out
}

// evaluate calculates every group of x under the named calc preset.
func evaluate(t *testing.T, x *Extraction, preset string) []GroupResult {
	t.Helper()
	pol, err := calc.Preset(preset)
	require.NoError(t, err)
	cl := calc.NewCalculator(calc.Builtin())
	var res []GroupResult
	for _, g := range x.Groups {
		r := g.Request
		r.Policy = pol
		res = append(res, GroupResult{Outcome: cl.Evaluate(r)})
	}
	return res
}

// TestResultIDsBySpecimen: two creatinine specimens of one patient with
// the same collection date, each in its own request, get different eGFR
// ids; an entered-in-error on one withdraws its own eGFR only; a resend
// with the identifiers in another order, or a corrected version, gets the
// same id.
func TestResultIDsBySpecimen(t *testing.T) {
	c := newCodec(t)
	meta := Meta{Now: time.Date(2024, 7, 1, 12, 0, 0, 0, time.UTC), SoftwareVersion: "test", ConfigHash: "h"}
	pat := identifiers(sysMRN, "NVL-100303")
	specimen := func(status, ids string) []byte {
		return specimenBundle(pat, creatinine(`"status": "`+status+`", "identifier": `+ids))
	}
	a := identifiers(sysResult, "R-0305-01")
	b := identifiers(sysResult, "R-0305-02")
	answer := func(body []byte, withdraw ...Withdrawal) [][2]string {
		t.Helper()
		x := extract(t, body, EndpointBundle)
		res := evaluate(t, x, "nkf-asn-2021")
		res[0].Withdrawals = withdraw
		out, err := c.Response(x, res, meta)
		require.NoError(t, err)
		require.NoError(t, c.Validate(out))
		return eGFRs(t, out)
	}
	first := answer(specimen("final", a))
	second := answer(specimen("final", b))
	require.Len(t, first, 1)
	require.Len(t, second, 1)
	require.NotEqual(t, first[0][0], second[0][0], "two specimens, two eGFRs")

	cases := []struct {
		name   string
		body   []byte
		wantID string
	}{
		{"resent", specimen("final", a), first[0][0]},
		{"corrected, same identifier", specimen("corrected", a), first[0][0]},
		{"amended, same identifier", specimen("amended", a), first[0][0]},
		{"the other specimen resent", specimen("final", b), second[0][0]},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			got := answer(tc.body)
			require.Len(t, got, 1)
			require.Equal(t, tc.wantID, got[0][0])
		})
	}
	t.Run("identifier order does not matter", func(t *testing.T) {
		one := answer(specimen("final", identifiers(sysResult, "R-0305-01", "https://northfield-valley-lab.example/lis/specimen", "S-9")))
		two := answer(specimen("final", identifiers("https://northfield-valley-lab.example/lis/specimen", "S-9", sysResult, "R-0305-01")))
		require.Equal(t, one, two)
	})
	t.Run("entered in error withdraws its own eGFR only", func(t *testing.T) {
		body := specimen("entered-in-error", a)
		x := extract(t, body, EndpointBundle)
		w := Withdrawal{SourceID: x.Inputs[0].SourceID, Equation: "ckd-epi-2021-cr", EquationName: "CKD-EPI 2021 creatinine",
			LOINC: "98979-8", Unit: calc.UnitIndexed, Status: "entered-in-error"}
		got := answer(body, w)
		require.Equal(t, [][2]string{{first[0][0], "entered-in-error"}}, got)
		require.NotEqual(t, second[0][0], got[0][0])
	})
}

// TestWithdrawalIdentityCombined: a combined creatinine–cystatin C eGFR is
// withdrawn under its result's id when the request holds both inputs; for
// a cystatin C sent alone the other identity is unknown and the id falls
// back to patient, time, equation and sex (the documented limitation).
func TestWithdrawalIdentityCombined(t *testing.T) {
	c := newCodec(t)
	meta := Meta{Now: time.Date(2024, 7, 1, 12, 0, 0, 0, time.UTC), SoftwareVersion: "test", ConfigHash: "h"}
	pat := identifiers(sysMRN, "NVL-100304")
	cys := func(status string) string {
		return `{"resourceType": "Observation", "status": "` + status + `", "identifier": ` + identifiers(sysResult, "R-CYS-1") + `,
		  "code": {"coding": [{"system": "http://loinc.org", "code": "33863-2"}]}, "effectiveDateTime": "2024-03-05",
		  "valueQuantity": {"value": 1.1, "code": "mg/L"}}`
	}
	cr := creatinine(`"status": "final", "identifier": ` + identifiers(sysResult, "R-CR-1"))

	x := extract(t, specimenBundle(pat, cr, cys("final")), EndpointBundle)
	res := evaluate(t, x, "nkf-asn-2021")
	var combined string
	for _, r := range res[0].Outcome.Results {
		if r.Equation == "ckd-epi-2021-crcys" {
			used := x.Groups[0].used(&res[0].Outcome, r)
			combined = "egfr-" + resultID(x.Groups[0], r.Equation, "", identities(used, r.Uses))
		}
	}
	require.NotEmpty(t, combined, "the nkf-asn-2021 adult band reports CKD-EPI 2021 creatinine–cystatin C")

	withdraw := func(body []byte) string {
		x := extract(t, body, EndpointBundle)
		var src string
		for _, o := range x.Inputs {
			if o.Analyte == calc.CystatinC {
				src = o.SourceID
			}
		}
		w := Withdrawal{SourceID: src, Equation: "ckd-epi-2021-crcys", EquationName: "CKD-EPI 2021 creatinine–cystatin C",
			Unit: calc.UnitIndexed, Status: "entered-in-error"}
		out, err := c.Response(x, []GroupResult{{Outcome: evaluate(t, x, "nkf-asn-2021")[0].Outcome, Withdrawals: []Withdrawal{w}}}, meta)
		require.NoError(t, err)
		var ids []string
		for _, e := range eGFRs(t, out) {
			if e[1] == "entered-in-error" {
				ids = append(ids, e[0])
			}
		}
		require.Len(t, ids, 1)
		return ids[0]
	}
	require.Equal(t, combined, withdraw(specimenBundle(pat, cr, cys("entered-in-error"))), "both inputs in the request")

	alone := extract(t, specimenBundle(pat, cys("entered-in-error")), EndpointBundle)
	require.Equal(t, "egfr-"+resultID(alone.Groups[0], "ckd-epi-2021-crcys", "", nil), withdraw(specimenBundle(pat, cys("entered-in-error"))),
		"cystatin C alone: the fallback id")
}

// TestStatusFollowsEveryInput: the eGFR's status is the least final of
// every input it was calculated from, height included, and derivedFrom
// names them all. A 12-year-old boy: the nkf-asn-2021 preset uses CKiD U25
// creatinine (Pierce 2021), which needs height.
func TestStatusFollowsEveryInput(t *testing.T) {
	c := newCodec(t)
	meta := Meta{Now: time.Date(2024, 7, 1, 12, 0, 0, 0, time.UTC), SoftwareVersion: "test", ConfigHash: "h"}
	body := func(crStatus, htStatus string) []byte {
		b := string(specimenBundle(identifiers(sysMRN, "NVL-100305"),
			creatinine(`"id": "nvl-o-cr", "status": "`+crStatus+`"`),
			`{"resourceType": "Observation", "id": "nvl-o-ht", "status": "`+htStatus+`", "code": {"coding": [{"system": "http://loinc.org", "code": "8302-2"}]},
			  "effectiveDateTime": "2024-03-05", "valueQuantity": {"value": 150, "code": "cm"}}`))
		return []byte(strings.Replace(b, `"birthDate": "1964-02-10"`, `"birthDate": "2012-03-05"`, 1))
	}
	cases := []struct {
		cr, ht, want string
	}{
		{"final", "final", "final"},
		{"final", "corrected", "corrected"},
		{"final", "amended", "amended"},
		{"final", "preliminary", "preliminary"},
		{"corrected", "final", "corrected"},
		{"corrected", "preliminary", "preliminary"},
	}
	for _, tc := range cases {
		t.Run(tc.cr+"+"+tc.ht, func(t *testing.T) {
			x := extract(t, body(tc.cr, tc.ht), EndpointBundle)
			res := evaluate(t, x, "nkf-asn-2021")
			require.Len(t, res[0].Outcome.Results, 1)
			r := res[0].Outcome.Results[0]
			require.Equal(t, "ckid-u25-cr", r.Equation)
			// Pierce et al., Kidney Int 2021, and the CKiD study's
			// reference code (ckidstudy/CKiD_U25): male, 12 ≤ age < 18,
			// K = 39.0 × 1.045^(age − 12), 39.0 at exactly 12 years; by
			// hand 39.0 × 1.50 m / 1.4 mg/dL = 41.786.
			require.InDelta(t, 41.786, r.Exact, 0.001)
			out, err := c.Response(x, res, meta)
			require.NoError(t, err)
			require.NoError(t, c.Validate(out))
			got := eGFRs(t, out)
			require.Len(t, got, 1)
			require.Equal(t, tc.want, got[0][1])
			require.Contains(t, string(out), `"derivedFrom":[{"reference":"Observation/nvl-o-cr"},{"reference":"Observation/nvl-o-ht"}]`)
		})
	}
	t.Run("a corrected height keeps the eGFR's id", func(t *testing.T) {
		ids := map[string]bool{}
		for _, ht := range []string{"final", "corrected"} {
			x := extract(t, body("final", ht), EndpointBundle)
			out, err := c.Response(x, evaluate(t, x, "nkf-asn-2021"), meta)
			require.NoError(t, err)
			ids[eGFRs(t, out)[0][0]] = true
		}
		require.Len(t, ids, 1)
	})
}

// forwardedEntry is the request and fullUrl of one forwarded entry.
type forwardedEntry struct {
	Method, URL, IfNoneExist string
	FullURL                  bool
}

// TestForwardRequests: how each request resource is sent downstream.
func TestForwardRequests(t *testing.T) {
	c := newCodec(t)
	meta := Meta{Now: time.Date(2024, 7, 1, 12, 0, 0, 0, time.UTC), SoftwareVersion: "test", ConfigHash: "h"}
	escaped := url.QueryEscape(sysResult) + "|" + url.QueryEscape("R 2024/03&05")
	cases := []struct {
		name    string
		entry   string // an Observation entry: resource and request
		patient string // the Patient entry's extra members
		want    forwardedEntry
	}{
		{"identifier, no id, no request: conditional update",
			`"resource": ` + creatinine(`"status": "corrected", "identifier": `+identifiers(sysResult, "R 2024/03&05")), "",
			forwardedEntry{Method: "PUT", URL: "Observation?identifier=" + escaped, FullURL: true}},
		{"identifier, no id, sender POST with a condition: conditional update",
			`"resource": ` + creatinine(`"status": "corrected", "identifier": `+identifiers(sysResult, "R 2024/03&05")) +
				`, "request": {"method": "POST", "url": "Observation", "ifNoneExist": "identifier=x|y"}`, "",
			forwardedEntry{Method: "PUT", URL: "Observation?identifier=" + escaped, FullURL: true}},
		{"identifier, no id, sender PUT: the sender's request",
			`"resource": ` + creatinine(`"status": "final", "identifier": `+identifiers(sysResult, "R-1")) +
				`, "request": {"method": "PUT", "url": "Observation?identifier=` + sysResult + `|R-1"}`, "",
			forwardedEntry{Method: "PUT", URL: "Observation?identifier=" + sysResult + "|R-1", FullURL: true}}, // derivedFrom refers to its urn:uuid
		{"identifier and id: PUT to the id",
			`"resource": ` + creatinine(`"id": "nvl-o-4", "status": "final", "identifier": `+identifiers(sysResult, "R-1")), "",
			forwardedEntry{Method: "PUT", URL: "Observation/nvl-o-4"}},
		{"identifier and id, sender POST: the sender's request",
			`"resource": ` + creatinine(`"id": "nvl-o-4", "status": "final", "identifier": `+identifiers(sysResult, "R-1")) +
				`, "request": {"method": "POST", "url": "Observation"}`, "",
			forwardedEntry{Method: "POST", URL: "Observation"}},
		{"identifier without system, no id: POST",
			`"resource": ` + creatinine(`"status": "final", "identifier": [{"value": "R-1"}]`), "",
			forwardedEntry{Method: "POST", URL: "Observation", FullURL: true}},
		{"nothing: POST",
			`"resource": ` + creatinine(`"status": "final"`), "",
			forwardedEntry{Method: "POST", URL: "Observation", FullURL: true}},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			body := `{"resourceType": "Bundle", "type": "collection", "entry": [
			 {"fullUrl": "urn:uuid:00000000-0000-4000-8000-0000000000f1", "resource": {"resourceType": "Patient",
			   "identifier": ` + identifiers(sysMRN, "NVL-100306", sysLISPat, "P 1/2") + `, "gender": "male", "birthDate": "1964-02-10"}},
			 {` + strings.Replace(tc.entry, `{"resourceType": "Observation", `, `{"resourceType": "Observation", "subject": {"reference": "urn:uuid:00000000-0000-4000-8000-0000000000f1"}, `, 1) + `}]}`
			x := extract(t, []byte(body), EndpointBundle)
			_, fw, err := c.Forward(x, evaluate(t, x, "nkf-asn-2021"), meta)
			require.NoError(t, err)
			require.NoError(t, c.Validate(fw))
			var b struct {
				Entry []struct {
					FullURL string `json:"fullUrl"`
					Request struct {
						Method, URL, IfNoneExist string
					}
				}
			}
			require.NoError(t, json.Unmarshal(fw, &b))
			// The Patient has no id and no request: a conditional update
			// on its smallest identifier, query-escaped (the LIS patient
			// system sorts before the MRN system).
			require.Equal(t, "PUT", b.Entry[0].Request.Method)
			require.Equal(t, "Patient?identifier="+url.QueryEscape(sysLISPat)+"|"+url.QueryEscape("P 1/2"), b.Entry[0].Request.URL)
			require.Equal(t, "Patient?identifier=https%3A%2F%2Fnorthfield-valley-lab.example%2Flis%2Fpatient|P+1%2F2", b.Entry[0].Request.URL)
			require.Empty(t, b.Entry[0].Request.IfNoneExist)
			e := b.Entry[1]
			require.Equal(t, tc.want, forwardedEntry{Method: e.Request.Method, URL: e.Request.URL, IfNoneExist: e.Request.IfNoneExist, FullURL: e.FullURL != ""})
		})
	}
}
