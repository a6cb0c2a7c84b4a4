package hl7v2

import (
	"flag"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/stretchr/testify/require"

	"filtrate/calc"
)

var update = flag.Bool("update", false, "rewrite the expected files under testdata")

// Result templates. Equation IDs are those of DESIGN.md. LOINC 98980-6 and
// its name: LOINC, as quoted by the HL7 Switzerland ch-lab-report
// implementation guide (profile ChLabObservation_eGFRcr_cys_CKD_EPI_2021);
// LOINC 98979-8 and its name: from memory. The reported values, categories
// and comments below are invented for these tests: hl7v2 only carries them,
// it does not compute them.
var (
	egfrCr = calc.Result{
		Equation: "ckd-epi-2021-cr", EquationVersion: "1", EquationName: "CKD-EPI 2021 creatinine",
		LOINC:     "98979-8",
		LOINCName: "Glomerular filtration rate/1.73 sq M.predicted [Volume Rate/Area] in Serum, Plasma or Blood by Creatinine-based formula (CKD-EPI 2021)",
		Uses:      []calc.Analyte{calc.Creatinine},
		Unit:      calc.UnitIndexed,
	}
	egfrCrCys = calc.Result{
		Equation: "ckd-epi-2021-crcys", EquationVersion: "1", EquationName: "CKD-EPI 2021 creatinine-cystatin C",
		LOINC:     "98980-6",
		LOINCName: "Glomerular filtration rate/1.73 sq M.predicted [Volume Rate/Area] in Serum, Plasma or Blood by Creatinine and Cystatin C-based formula (CKD-EPI 2021)",
		Uses:      []calc.Analyte{calc.Creatinine, calc.CystatinC},
		Unit:      calc.UnitIndexed,
	}
)

func withdrawal(tpl calc.Result, source, assumedSex, status string) Withdrawal {
	return Withdrawal{SourceID: source, Equation: tpl.Equation, EquationName: tpl.EquationName,
		LOINC: tpl.LOINC, LOINCName: tpl.LOINCName, Unit: tpl.Unit, AssumedSex: assumedSex, Status: status}
}

func result(tpl calc.Result, reported, category string, comments ...string) calc.Result {
	tpl.Reported, tpl.Category, tpl.Comments = reported, category, comments
	return tpl
}

const (
	commentSteady = "eGFR assumes stable kidney function; it is unreliable in acute kidney injury."
	commentDosing = "For drug dosing the non-indexed value (mL/min) may be needed."
)

// checkGolden compares got with testdata/name, or rewrites the file with
// -update. Carriage returns are shown as line breaks in a failure.
func checkGolden(t *testing.T, name string, got []byte) {
	t.Helper()
	path := filepath.Join("testdata", name)
	if *update {
		require.NoError(t, os.WriteFile(path, got, 0o644))
	}
	want, err := os.ReadFile(path)
	require.NoError(t, err)
	show := func(b []byte) string { return strings.ReplaceAll(string(b), "\r", "\n") }
	require.Equal(t, show(want), show(got))
	require.Equal(t, want, got)
}

func TestEnrichGolden(t *testing.T) {
	tests := []struct {
		in, want string
		outcomes []*calc.Outcome
		opts     EnrichOptions
	}{
		{
			in: "oru_creatinine_final.hl7", want: "oru_creatinine_final.enriched.hl7",
			outcomes: []*calc.Outcome{{
				Inputs:  []calc.InputUse{{Analyte: calc.Creatinine, SourceID: "OBR1/OBX2"}},
				Results: []calc.Result{result(egfrCr, "68", "G2", commentSteady, commentDosing)},
			}},
		},
		{
			in: "oru_crcys_capped.hl7", want: "oru_crcys_capped.enriched.hl7",
			outcomes: []*calc.Outcome{
				{
					Inputs: []calc.InputUse{
						{Analyte: calc.Creatinine, SourceID: "OBR1/OBX1"},
						{Analyte: calc.CystatinC, SourceID: "OBR1/OBX2"},
						{Analyte: calc.Height, SourceID: "OBR2/OBX1"},
						{Analyte: calc.Weight, SourceID: "OBR2/OBX2"},
					},
					Results: []calc.Result{
						result(egfrCr, "88", "G2", commentSteady),
						func() calc.Result {
							r := result(egfrCrCys, ">90", "G1", commentSteady)
							r.Capped = true
							return r
						}(),
					},
				},
				nil, // the vitals order needs no calculation
			},
		},
		{
			in: "oru_censored_refused.hl7", want: "oru_censored_refused.enriched.hl7",
			outcomes: []*calc.Outcome{{
				Refusals: []calc.Refusal{
					{Code: calc.ReasonValueCensored, Message: calc.ReasonValueCensored.Describe(), Equation: "ckd-epi-2021-cr", Analyte: calc.Creatinine, SourceID: "OBR1/OBX1"},
					// The same reason for a second equation is written once.
					{Code: calc.ReasonValueCensored, Message: calc.ReasonValueCensored.Describe(), Equation: "ekfc-cr", Analyte: calc.Creatinine, SourceID: "OBR1/OBX1"},
				},
			}},
		},
		{
			in: "oru_corrected_delims.hl7", want: "oru_corrected_delims.enriched.hl7",
			outcomes: []*calc.Outcome{{
				Inputs:  []calc.InputUse{{Analyte: calc.Creatinine, SourceID: "OBR1/OBX1"}},
				Results: []calc.Result{result(egfrCr, "64", "G2", "Corrected: replaces the eGFR of report #NVL20250314-0001 * see note.")},
			}},
		},
		{
			in: "oru_cancel_delete.hl7", want: "oru_cancel_delete.enriched.hl7",
			outcomes: []*calc.Outcome{nil, nil},
			// As internal/ingest decides for this message: the X creatinine
			// of order 1 cancels the creatinine eGFR, the D creatinine of
			// order 2 deletes it. Neither order reports cystatin C, so no
			// creatinine-cystatin C eGFR can have been sent.
			opts: EnrichOptions{Withdrawals: [][]Withdrawal{
				{withdrawal(egfrCr, "OBR1/OBX1", "", "X")},
				{withdrawal(egfrCr, "OBR2/OBX1", "", "D")},
			}},
		},
	}
	for _, tt := range tests {
		t.Run(tt.in, func(t *testing.T) {
			o := extract(t, tt.in)
			before := o.Message().Encode()
			got, err := o.Enrich(tt.outcomes, tt.opts)
			require.NoError(t, err)
			checkGolden(t, tt.want, got.Encode())

			require.Equal(t, before, o.Message().Encode(), "the original message is not modified")
			require.Equal(t, o.Message().MSH().String(), got.MSH().String(), "MSH is forwarded byte for byte")
			// Every original segment survives unchanged except for OBX-1.
			orig := o.Message().Segments()
			j := 0
			for _, s := range got.Segments() {
				if j < len(orig) && s.Name() == orig[j].Name() && sameExceptSetID(s, orig[j]) {
					if s.Field(1).Raw() == orig[j].Field(1).Raw() {
						require.Equal(t, orig[j].String(), s.String())
					}
					j++
				}
			}
			require.Equal(t, len(orig), j, "all original segments are kept in order")
			// The enriched message parses again.
			_, err = Parse(got.Encode())
			require.NoError(t, err)
		})
	}
}

func sameExceptSetID(a, b *Segment) bool {
	if a.NumFields() != b.NumFields() {
		return false
	}
	for n := 2; n <= a.NumFields(); n++ {
		if a.Field(n).Raw() != b.Field(n).Raw() {
			return false
		}
	}
	return true
}

func TestEnrichStatusesAndNotes(t *testing.T) {
	m, err := Parse([]byte(seg(
		`MSH|^~\&|NVLAB|NVL|EHR|NVH|20250314093000||ORU^R01|E1|P|2.5.1`,
		`PID|1||NVL0000999^^^NVL^MR||Ashdown^Lior||19700101|F`,
		`OBR|1||||||20250314080000`,
		`OBX|1|NM|2160-0^Creatinine^LN||0.9|mg/dL|||||`,
		`NTE|7|L|existing note`,
		`OBX|2|NM|33863-2^Cystatin C^LN||0.8|mg/L|||||W`,
		`OBX|3|NM|2160-0^Creatinine^LN||0.8|mg/dL|||||P`,
		`OBX|4|NM|2951-2^Sodium^LN||140|mmol/L|||||F`,
	)))
	require.NoError(t, err)
	o, err := ExtractORU(m, ExtractOptions{})
	require.NoError(t, err)
	out := &calc.Outcome{
		Results: []calc.Result{result(egfrCr, "75", "")},
		Refusals: []calc.Refusal{
			// Anchored to the unknown-status OBX: its status note suffices.
			{Code: calc.ReasonInputDuplicate, Message: "dup", SourceID: "OBR1/OBX1"},
			// No source, no analyte: after the first creatinine result,
			// which is silenced too.
			{Code: calc.ReasonAgeMissing},
			// By analyte: the usable creatinine.
			{Code: calc.ReasonNoEquation, Analyte: calc.Creatinine},
		},
	}
	got, err := o.Enrich([]*calc.Outcome{out}, EnrichOptions{
		CommentSource: "O",
		Flag:          func(calc.Result) string { return "N" },
	})
	require.NoError(t, err)
	want := seg(
		`MSH|^~\&|NVLAB|NVL|EHR|NVH|20250314093000||ORU^R01|E1|P|2.5.1`,
		`PID|1||NVL0000999^^^NVL^MR||Ashdown^Lior||19700101|F`,
		`OBR|1||||||20250314080000`,
		`OBX|1|NM|2160-0^Creatinine^LN||0.9|mg/dL|||||`,
		`NTE|7|L|existing note`,
		`NTE|8|O|eGFR not calculated: the result status is missing or not recognised.`,
		`OBX|2|NM|33863-2^Cystatin C^LN||0.8|mg/L|||||W`,
		`NTE|1|O|Any eGFR calculated earlier from this result is withdrawn.`,
		`OBX|3|NM|2160-0^Creatinine^LN||0.8|mg/dL|||||P`,
		`NTE|1|O|eGFR not calculated: no equation in the policy applies to these results.`,
		`OBX|4|NM|98979-8^`+egfrCr.LOINCName+`^LN|ckd-epi-2021-cr|75|mL/min/{1.73_m2}^^UCUM||N|||P|||20250314080000|||ckd-epi-2021-cr^CKD-EPI 2021 creatinine^L`,
		`OBX|5|NM|2951-2^Sodium^LN||140|mmol/L|||||F`,
	)
	require.Equal(t, strings.ReplaceAll(want, "\r", "\n"), strings.ReplaceAll(string(got.Encode()), "\r", "\n"))
}

func TestEnrichSexVariantsGetStableSubIDs(t *testing.T) {
	// With sex unknown a policy may report both values; OBX-3 plus OBX-4
	// must identify each observation within the order (HL7 v2.5.1 chapter
	// 7, OBX-4 Observation Sub-ID), and the same one in every message.
	o := extract(t, "oru_creatinine_final.hl7")
	female := result(egfrCr, "68", "G2")
	female.AssumedSex = "female"
	male := result(egfrCr, "91", "G1")
	male.AssumedSex = "male"
	got, err := o.Enrich([]*calc.Outcome{{Results: []calc.Result{female, male}}}, EnrichOptions{})
	require.NoError(t, err)
	var subs, notes []string
	for _, s := range got.Segments() {
		if s.Name() == "OBX" && s.Field(3).String() == "98979-8" {
			subs = append(subs, s.Field(4).String())
		}
		if s.Name() == "NTE" && strings.HasPrefix(s.Field(3).String(), "Calculated as if") {
			notes = append(notes, s.Field(3).String())
		}
	}
	require.Equal(t, []string{"ckd-epi-2021-cr.F", "ckd-epi-2021-cr.M"}, subs)
	require.Equal(t, []string{
		"Calculated as if the patient were female: sex is not recorded as female or male.",
		"Calculated as if the patient were male: sex is not recorded as female or male.",
	}, notes)
}

func TestEnrichValueTypes(t *testing.T) {
	d := DefaultDelimiters()
	tests := []struct {
		reported  string
		capped    bool
		unit      string
		valueType string
		value     string
		units     string
	}{
		{"68", false, calc.UnitIndexed, "NM", "68", "mL/min/{1.73_m2}^^UCUM"},
		{">90", true, calc.UnitIndexed, "SN", ">^90", "mL/min/{1.73_m2}^^UCUM"},
		{"90", true, calc.UnitIndexed, "SN", ">^90", "mL/min/{1.73_m2}^^UCUM"},
		{"<15", false, "", "SN", "<^15", "mL/min/{1.73_m2}^^UCUM"},
		{"104.5", false, calc.UnitNotIndexed, "NM", "104.5", "mL/min^^UCUM"},
		{"n/a", false, calc.UnitIndexed, "ST", "n/a", "mL/min/{1.73_m2}^^UCUM"},
	}
	for _, tt := range tests {
		t.Run(tt.reported, func(t *testing.T) {
			o := extract(t, "oru_creatinine_final.hl7")
			r := result(egfrCr, tt.reported, "")
			r.Capped, r.Unit = tt.capped, tt.unit
			got, err := o.Enrich([]*calc.Outcome{{Results: []calc.Result{r}}}, EnrichOptions{})
			require.NoError(t, err)
			s := got.Segment(8) // after the creatinine OBX and its NTE
			require.Equal(t, "OBX", s.Name())
			require.Equal(t, tt.valueType, s.Field(2).String())
			require.Equal(t, tt.value, s.Field(5).Raw())
			require.Equal(t, tt.units, s.Field(6).Raw())
			_ = d
		})
	}
}

func TestEnrichErrors(t *testing.T) {
	o := extract(t, "oru_creatinine_final.hl7")
	_, err := o.Enrich(nil, EnrichOptions{})
	require.Error(t, err)
	noCode := result(egfrCr, "68", "")
	noCode.LOINC = ""
	_, err = o.Enrich([]*calc.Outcome{{Results: []calc.Result{noCode}}}, EnrichOptions{})
	require.Error(t, err)
	_, err = o.Enrich([]*calc.Outcome{{Results: []calc.Result{result(egfrCr, "", "")}}}, EnrichOptions{})
	require.Error(t, err)
}

func TestEnrichWithoutOutcomesKeepsMessage(t *testing.T) {
	o := extract(t, "oru_creatinine_final.hl7")
	got, err := o.Enrich([]*calc.Outcome{nil}, EnrichOptions{})
	require.NoError(t, err)
	require.Equal(t, o.Message().Encode(), got.Encode())
}

func TestACKGolden(t *testing.T) {
	orig := readMessage(t, "oru_creatinine_final.hl7")
	checkGolden(t, "ack_aa.hl7", BuildACK(orig, AckAccept, "", "", "NVF-ACK-0001", ackTime).Encode())
	checkGolden(t, "ack_ae.hl7", BuildACK(orig, AckError, "Temporary storage failure; please resend.", "", "NVF-ACK-0002", ackTime).Encode())

	// A frame without a usable MSH: AR with default delimiters.
	bad := []byte("PID|1||NVL0000123^^^NVL^MR||Marlowe^Ione\r")
	_, err := Parse(bad)
	var pe *ParseError
	require.ErrorAs(t, err, &pe)
	ar := BuildACKDetail(nil, AckReject, ErrorDetail{Code: pe.Code(), Location: pe.Location(), Text: "Message rejected: " + pe.Err.Error() + "."}, "NVF-ACK-0003", ackTime)
	checkGolden(t, "ack_ar_no_msh.hl7", ar.Encode())
	require.NotContains(t, string(ar.Encode()), "Marlowe")
	require.NotContains(t, string(ar.Encode()), "NVL0000123")
}

// TestSubID: OBX-4 is the equation ID plus ".F"/".M" for an assumed sex,
// and fits OBX-4 (ST, length 20 in HL7 v2.5.1 chapter 7, OBX field
// attributes) for every equation filtrate implements.
func TestSubID(t *testing.T) {
	tests := []struct {
		equation, sex, want string
		ok                  bool
	}{
		{"ekfc-cr", "", "ekfc-cr", true},
		{"ckd-epi-2021-cr", "female", "ckd-epi-2021-cr.F", true},
		{"ckd-epi-2021-cr", "male", "ckd-epi-2021-cr.M", true},
		{"ckd-epi-2021-crcys", "female", "ckd-epi-2021-crcys.F", true}, // exactly 20
		{"ckd-epi-2021-crcys-x", "male", "", false},                    // 22: too long
		{"ckd-epi-2021-cr", "unknown", "", false},
		{"", "", "", false},
	}
	for _, tt := range tests {
		t.Run(tt.equation+"/"+tt.sex, func(t *testing.T) {
			got, err := SubID(tt.equation, tt.sex)
			if !tt.ok {
				require.Error(t, err)
				return
			}
			require.NoError(t, err)
			require.Equal(t, tt.want, got)
		})
	}
	for _, id := range calc.Builtin().IDs() {
		got, err := SubID(id, "female")
		require.NoError(t, err, id)
		require.LessOrEqual(t, len(got), MaxSubIDLength, id)
	}
}

// EKFC templates: EKFC has no equation-specific LOINC code, so the policy's
// generic 69405-9 is used (calc.GenericLOINC; LOINC 69405-9 "Glomerular
// filtration rate/1.73 sq M.predicted", name as in package calc).
var (
	ekfcCr    = calc.Result{Equation: "ekfc-cr", EquationName: "EKFC creatinine", LOINC: calc.GenericLOINC, LOINCName: calc.GenericLOINCName, Uses: []calc.Analyte{calc.Creatinine}, Unit: calc.UnitIndexed}
	ekfcCys   = calc.Result{Equation: "ekfc-cys", EquationName: "EKFC cystatin C", LOINC: calc.GenericLOINC, LOINCName: calc.GenericLOINCName, Uses: []calc.Analyte{calc.CystatinC}, Unit: calc.UnitIndexed}
	ekfcCrCys = calc.Result{Equation: "ekfc-crcys", EquationName: "EKFC creatinine–cystatin C (mean)", LOINC: calc.GenericLOINC, LOINCName: calc.GenericLOINCName, Uses: []calc.Analyte{calc.Creatinine, calc.CystatinC}, Unit: calc.UnitIndexed}
)

// obxView is OBX-3.1, OBX-4, OBX-5, OBX-11 and OBX-17.1 of an added OBX
// and the text of the NTE after it.
type obxView struct {
	code, sub, value, status, equation, note string
}

// added lists the OBX segments whose OBX-17 names an equation (the ones
// Enrich writes), each with the first NTE after it.
func added(m *Message) []obxView {
	var out []obxView
	segs := m.Segments()
	for i, s := range segs {
		if s.Name() != "OBX" || s.Field(17).Component(1).String() == "" {
			continue
		}
		v := obxView{code: s.Field(3).Component(1).String(), sub: s.Field(4).String(), value: s.Field(5).String(),
			status: s.Field(11).String(), equation: s.Field(17).Component(1).String()}
		if i+1 < len(segs) && segs[i+1].Name() == "NTE" {
			v.note = segs[i+1].Field(3).String()
		}
		out = append(out, v)
	}
	return out
}

// TestEnrichWithdrawals: each withdrawal is written as given, with the
// OBX-3 and OBX-4 of the result it withdraws, after the input it names,
// and with a note that follows its status (HL7 v2.5.1 table 0085: D deletes
// the OBX record, W posts the original as wrong, X results cannot be
// obtained). Enrich adds no withdrawal of its own.
func TestEnrichWithdrawals(t *testing.T) {
	msg := func(crStatus, cysStatus string) *ORU {
		m, err := Parse([]byte(seg(
			`MSH|^~\&|NVLAB|NVL|EHR|NVH|20250314093000||ORU^R01|W1|P|2.5.1`,
			`PID|1||NVL0000777^^^NVL^MR||Fenwright^Odile||19700101|F`,
			`OBR|1||||||20250314080000`,
			`OBX|1|NM|2160-0^Creatinine^LN||1.0|mg/dL|||||`+crStatus,
			`OBX|2|NM|33863-2^Cystatin C^LN||1.0|mg/L|||||`+cysStatus,
		)))
		require.NoError(t, err)
		o, err := ExtractORU(m, ExtractOptions{})
		require.NoError(t, err)
		return o
	}
	tests := []struct {
		name        string
		cr, cys     string
		outcome     *calc.Outcome
		withdrawals []Withdrawal
		want        []obxView
		inputNote   string // a note expected on the input OBX
	}{
		{
			name: "cystatin C posted as wrong; the creatinine eGFR stays", cr: "F", cys: "W",
			outcome: &calc.Outcome{
				Inputs:  []calc.InputUse{{Analyte: calc.Creatinine, SourceID: "OBR1/OBX1"}},
				Results: []calc.Result{result(ekfcCr, "64", "G2")},
			},
			withdrawals: []Withdrawal{
				withdrawal(ekfcCys, "OBR1/OBX2", "", "W"),
				withdrawal(ekfcCrCys, "OBR1/OBX2", "", "W"),
			},
			want: []obxView{
				{"69405-9", "ekfc-cr", "64", "F", "ekfc-cr", "KDIGO GFR category: G2"},
				{"69405-9", "ekfc-cys", "", "W", "ekfc-cys", noteWrong},
				{"69405-9", "ekfc-crcys", "", "W", "ekfc-crcys", noteWrong},
			},
		},
		{
			name: "creatinine deleted, sex variants", cr: "D", cys: "F",
			withdrawals: []Withdrawal{
				withdrawal(egfrCr, "OBR1/OBX1", "female", "D"),
				withdrawal(egfrCr, "OBR1/OBX1", "male", "D"),
			},
			want: []obxView{
				{"98979-8", "ckd-epi-2021-cr.F", "", "D", "ckd-epi-2021-cr", noteDeleted},
				{"98979-8", "ckd-epi-2021-cr.M", "", "D", "ckd-epi-2021-cr", noteDeleted},
			},
		},
		{
			name: "creatinine cancelled", cr: "X", cys: "F",
			withdrawals: []Withdrawal{withdrawal(egfrCr, "OBR1/OBX1", "", "X")},
			want:        []obxView{{"98979-8", "ckd-epi-2021-cr", "", "X", "ckd-epi-2021-cr", noteVoided}},
			inputNote:   noteCancelled,
		},
		{
			name: "corrected creatinine no longer gives the eGFR", cr: "C", cys: "F",
			outcome: &calc.Outcome{Refusals: []calc.Refusal{{Code: calc.ReasonValueNotNumeric, Message: calc.ReasonValueNotNumeric.Describe(),
				Analyte: calc.Creatinine, SourceID: "OBR1/OBX1"}}},
			withdrawals: []Withdrawal{withdrawal(egfrCr, "OBR1/OBX1", "", "D")},
			want:        []obxView{{"98979-8", "ckd-epi-2021-cr", "", "D", "ckd-epi-2021-cr", noteNoLonger}},
			inputNote:   calc.ReasonValueNotNumeric.Describe(),
		},
		{
			name: "deleted input without withdrawals gets a note", cr: "D", cys: "F",
			inputNote: noteWithdrawn,
		},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			o := msg(tt.cr, tt.cys)
			got, err := o.Enrich([]*calc.Outcome{tt.outcome}, EnrichOptions{Withdrawals: [][]Withdrawal{tt.withdrawals}})
			require.NoError(t, err)
			require.Equal(t, tt.want, added(got))
			for _, s := range got.Segments() {
				if s.Name() == "OBX" && s.Field(17).String() != "" {
					require.Equal(t, "NM", s.Field(2).String())
					require.Equal(t, "20250314080000", s.Field(14).String(), "OBX-14 is the collection time")
					require.Equal(t, calc.UnitIndexed+"^^UCUM", s.Field(6).Raw())
				}
			}
			// Each withdrawal follows the input it names.
			anchorCode := map[string]string{"OBR1/OBX1": "2160-0", "OBR1/OBX2": "33863-2"}
			var after []string
			input := ""
			for _, s := range got.Segments() {
				switch {
				case s.Name() != "OBX":
				case s.Field(17).String() == "":
					input = s.Field(3).Component(1).String()
				case s.Field(5).String() == "":
					after = append(after, input)
				}
			}
			var wantAfter []string
			for _, w := range tt.withdrawals {
				wantAfter = append(wantAfter, anchorCode[w.SourceID])
			}
			require.Equal(t, wantAfter, after)
			if tt.inputNote != "" {
				require.Contains(t, string(got.Encode()), "\rNTE|1|L|"+tt.inputNote+"\r")
			} else {
				require.NotContains(t, string(got.Encode()), noteWithdrawn)
			}
		})
	}
}

func TestEnrichWithdrawalErrors(t *testing.T) {
	o := extract(t, "oru_creatinine_final.hl7")
	bad := []Withdrawal{
		withdrawal(egfrCr, "OBR1/OBX2", "", "F"),        // not a withdrawing status
		withdrawal(egfrCr, "OBR1/OBX2", "unknown", "D"), // no sub-ID for this sex
		func() Withdrawal { w := withdrawal(egfrCr, "OBR1/OBX2", "", "D"); w.LOINC = ""; return w }(),
	}
	for _, w := range bad {
		_, err := o.Enrich([]*calc.Outcome{nil}, EnrichOptions{Withdrawals: [][]Withdrawal{{w}}})
		require.Error(t, err)
	}
	_, err := o.Enrich([]*calc.Outcome{nil}, EnrichOptions{Withdrawals: [][]Withdrawal{nil, nil}})
	require.Error(t, err, "more withdrawal lists than orders")
}

// Text filtrate adds is ASCII unless MSH-18 declares UTF-8 (HL7 v2.5.1
// section 2.15.9.18: an empty MSH-18 means ASCII).
func TestAddedTextFollowsTheCharacterSet(t *testing.T) {
	require.Equal(t, "CKD-EPI 2021 creatinine-cystatin C, 1.73 m2, 5 umol/L x 2 >= 1", asciiText("CKD-EPI 2021 creatinine–cystatin C, 1.73 m², 5 µmol/L × 2 ≥ 1"))
	require.Equal(t, "a?b", asciiText("a€b"))
}
