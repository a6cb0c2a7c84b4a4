package hl7v2

import (
	"os"
	"path/filepath"
	"testing"
	"time"

	"github.com/stretchr/testify/require"

	"filtrate/calc"
)

func readMessage(t testing.TB, name string) *Message {
	t.Helper()
	data, err := os.ReadFile(filepath.Join("testdata", name))
	require.NoError(t, err)
	m, err := Parse(data)
	require.NoError(t, err)
	return m
}

func extract(t testing.TB, name string) *ORU {
	t.Helper()
	o, err := ExtractORU(readMessage(t, name), ExtractOptions{})
	require.NoError(t, err)
	return o
}

func TestExtractORU(t *testing.T) {
	o := extract(t, "oru_crcys_capped.hl7")
	require.Equal(t, "NVL20250314-0002", o.ControlID)
	require.Len(t, o.Patients, 1)
	p := o.Patients[0]
	require.Equal(t, "NVL0000789", p.ID)
	require.Equal(t, "NVL", p.AssigningAuthority)
	require.Equal(t, []PatientIdentifier{{ID: "NVL0000789", AssigningAuthority: "NVL", TypeCode: "MR"}}, p.Identifiers)
	require.Equal(t, time.Date(1988, 2, 11, 0, 0, 0, 0, time.UTC), p.BirthDate.Time)
	require.Equal(t, PrecisionDay, p.BirthDate.Precision)
	require.Equal(t, "M", p.SexCode)
	require.Equal(t, calc.SexMale, p.Sex)

	require.Len(t, o.Orders, 2)
	ord := o.Orders[0]
	require.Equal(t, 1, ord.Index)
	require.Same(t, p, ord.Patient)
	require.Equal(t, "ORD2001", ord.PlacerOrder)
	require.Equal(t, "NVL555002", ord.FillerOrder)
	// SPM-17 takes precedence over OBR-7.
	require.Equal(t, "SPM-17", ord.CollectedFrom)
	require.Equal(t, "20250314074500+0100", ord.CollectedText)
	require.True(t, time.Date(2025, 3, 14, 6, 45, 0, 0, time.UTC).Equal(ord.CollectedAt.Time))
	require.Equal(t, "OBR-7", o.Orders[1].CollectedFrom)

	require.Len(t, ord.Observations, 2)
	cr := ord.Observations[0]
	require.Equal(t, "OBR1/OBX1", cr.SourceID)
	require.Equal(t, calc.Creatinine, cr.Analyte)
	require.Equal(t, "14682-9", cr.Code)
	require.Equal(t, "LN", cr.CodeSystem)
	require.Equal(t, "F", cr.Status)
	require.Equal(t, calc.Measurement{
		Analyte: calc.Creatinine, ValueText: "71", Unit: "umol/L",
		Method: "ENZ", Instrument: "NV-CHEM-02", SourceID: "OBR1/OBX1",
	}, cr.Measurement)
	require.Equal(t, calc.CystatinC, ord.Observations[1].Analyte)

	require.True(t, o.NeedsCalculation(0))
	require.False(t, o.NeedsCalculation(1), "the vitals order has no creatinine or cystatin C")

	req := o.Request(0)
	require.Equal(t, calc.SexMale, req.Sex)
	require.Equal(t, p.BirthDate.Time, req.BirthDate)
	require.True(t, ord.CollectedAt.Time.Equal(req.CollectedAt), "same instant")
	require.Equal(t, time.UTC, req.CollectedAt.Location(), "in the laboratory's zone (UTC by default)")
	var ids []string
	for _, m := range req.Measurements {
		ids = append(ids, string(m.Analyte)+"@"+m.SourceID+"="+m.ValueText+" "+m.Unit)
	}
	// Height and weight from the second order apply to the first.
	require.Equal(t, []string{
		"creatinine@OBR1/OBX1=71 umol/L",
		"cystatin_c@OBR1/OBX2=0.71 mg/L",
		"height@OBR2/OBX1=178 cm",
		"weight@OBR2/OBX2=81.5 kg",
	}, ids)
}

func TestExtractValues(t *testing.T) {
	msh := `MSH|^~\&|NVLAB|NVL|EHR|NVH|20250314093000||ORU^R01|V1|P|2.5.1`
	tests := []struct {
		name string
		obx  string
		want string
	}{
		// SN: HL7 v2.5.1 section 2.A.71, <comparator>^<num1>^<separator>^<num2>.
		{"SN censored below", `OBX|1|SN|2160-0^Creat^LN||<^0.2|mg/dL|||||F`, "<0.2"},
		{"SN censored above", `OBX|1|SN|2160-0^Creat^LN||>=^20|mg/dL|||||F`, ">=20"},
		{"SN plain", `OBX|1|SN|2160-0^Creat^LN||^0.92|mg/dL|||||F`, "0.92"},
		{"SN ratio: passed as sent, refused by calc", `OBX|1|SN|2160-0^Creat^LN||^1^:^2|mg/dL|||||F`, "^1^:^2"},
		{"SN num2 without separator is not 15", `OBX|1|SN|2160-0^Creat^LN||^1^^5|mg/dL|||||F`, "^1^^5"},
		{"SN explicit equals", `OBX|1|SN|2160-0^Creat^LN||=^1.0|mg/dL|||||F`, "1.0"},
		{"NM with a subcomponent is not 1.2", `OBX|1|NM|2160-0^Creat^LN||1.2&x|mg/dL|||||F`, "1.2&x"},
		{"NM with spaces", `OBX|1|NM|2160-0^Creat^LN|| 0.92 |mg/dL|||||F`, "0.92"},
		{"ST censored", `OBX|1|ST|2160-0^Creat^LN||<0.2|mg/dL|||||F`, "<0.2"},
		{"NM repeated", `OBX|1|NM|2160-0^Creat^LN||0.9~1.0|mg/dL|||||F`, "0.9~1.0"},
		{"NM with components", `OBX|1|NM|2160-0^Creat^LN||0.9^x|mg/dL|||||F`, "0.9^x"},
		{"escaped text", `OBX|1|ST|2160-0^Creat^LN||see\T\note|mg/dL|||||F`, "see&note"},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			m, err := Parse([]byte(seg(msh, `PID|1||P1`, `OBR|1`, tt.obx)))
			require.NoError(t, err)
			o, err := ExtractORU(m, ExtractOptions{})
			require.NoError(t, err)
			require.Equal(t, tt.want, o.Orders[0].Observations[0].Measurement.ValueText)
		})
	}
}

func TestCodeMap(t *testing.T) {
	local := []CodeEntry{
		{System: "99NVL", Code: "CREA", Analyte: calc.Creatinine, Unit: "umol/L"},
		{Code: "CYSC", Analyte: calc.CystatinC},
		{System: "LN", Code: "2160-0", Analyte: calc.UrineCreatinine}, // overrides the default
	}
	cm, err := NewCodeMap(append(DefaultCodeEntries(), local...)...)
	require.NoError(t, err)
	d := DefaultDelimiters()
	field := func(raw string) Field { return Field{raw: raw, d: d} }
	tests := []struct {
		obx3 string
		want calc.Analyte
		ok   bool
	}{
		{"33863-2^Cystatin C^LN", calc.CystatinC, true},
		{"CREA^Creatinine^99NVL", calc.Creatinine, true},
		{"CREA^Creatinine^OTHER", "", false},                              // system must match
		{"CYSC^Cystatin C^ANY", calc.CystatinC, true},                     // entry without system
		{"X1^Local creatinine^L^14682-9^Creat^LN", calc.Creatinine, true}, // alternate LOINC
		{"2160-0^Creatinine^LN", calc.UrineCreatinine, true},              // local override wins
		{"2160-0^Creatinine", "", false},                                  // LOINC needs its system
		{"", "", false},
	}
	for _, tt := range tests {
		e, ok := cm.Lookup(field(tt.obx3))
		require.Equal(t, tt.ok, ok, tt.obx3)
		require.Equal(t, tt.want, e.Analyte, tt.obx3)
	}

	// A configured unit fills an empty OBX-6.
	m, err := Parse([]byte(seg(`MSH|^~\&|A||||||ORU^R01|1|P|2.5.1`, `PID|1`, `OBR|1`, `OBX|1|NM|CREA^Creatinine^99NVL||81||||||F`)))
	require.NoError(t, err)
	o, err := ExtractORU(m, ExtractOptions{Codes: cm})
	require.NoError(t, err)
	require.Equal(t, "umol/L", o.Orders[0].Observations[0].Measurement.Unit)

	_, err = NewCodeMap(CodeEntry{System: "LN"})
	require.Error(t, err)
	_, err = NewCodeMap(CodeEntry{Code: "X"})
	require.Error(t, err)
}

func TestExtractSeveralPatients(t *testing.T) {
	// ORU^R01 repeats the PATIENT_RESULT group (HL7 v2.5.1 chapter 7):
	// height and weight must not cross from one patient to the other.
	m, err := Parse([]byte(seg(
		`MSH|^~\&|NVLAB|NVL|EHR|NVH|20250314093000||ORU^R01|P2|P|2.5.1`,
		`PID|1||NVL0000001^^^NVL^MR||Ashdown^Lior||19700101|F`,
		`OBR|1||||||20250314080000`,
		`OBX|1|NM|8302-2^Body height^LN||165|cm|||||F`,
		`PID|2||NVL0000002^^^NVL^MR||Ravensworth^Tamsin||20150601|M`,
		`OBR|2||||||20250314081000`,
		`OBX|1|NM|2160-0^Creatinine^LN||0.5|mg/dL|||||F`,
	)))
	require.NoError(t, err)
	o, err := ExtractORU(m, ExtractOptions{})
	require.NoError(t, err)
	require.Len(t, o.Patients, 2)
	require.Same(t, o.Patients[1], o.Orders[1].Patient)
	req := o.Request(1)
	require.Len(t, req.Measurements, 1, "the first patient's height is not used")
	require.Equal(t, calc.SexMale, req.Sex)
}

func TestExtractTimes(t *testing.T) {
	loc := time.FixedZone("NVL", 2*3600)
	m, err := Parse([]byte(seg(
		`MSH|^~\&|NVLAB|NVL|EHR|NVH|20250314093000||ORU^R01|T1|P|2.5.1`,
		`PID|1||P1||X^Y||19791302|U`,
		`OBR|1||||||202503140815`,
		`OBR|2||||||2025031408x5`,
	)))
	require.NoError(t, err)
	o, err := ExtractORU(m, ExtractOptions{Location: loc})
	require.NoError(t, err)
	p := o.Patients[0]
	require.True(t, p.BirthDateInvalid)
	require.True(t, p.BirthDate.IsZero())
	require.Equal(t, calc.SexUnknown, p.Sex)
	// No offset: local time of the configured location.
	require.True(t, time.Date(2025, 3, 14, 6, 15, 0, 0, time.UTC).Equal(o.Orders[0].CollectedAt.Time))
	require.True(t, o.Orders[1].CollectedInvalid)
	require.True(t, o.Request(1).CollectedAt.IsZero())

	// A date of birth known only to the month gives no age.
	m, err = Parse([]byte(seg(
		`MSH|^~\&|NVLAB|NVL|EHR|NVH|20250314093000||ORU^R01|T2|P|2.5.1`,
		`PID|1||P1||X^Y||197906|F`,
		`OBR|1||||||2025031408`,
	)))
	require.NoError(t, err)
	o, err = ExtractORU(m, ExtractOptions{})
	require.NoError(t, err)
	require.Equal(t, PrecisionMonth, o.Patients[0].BirthDate.Precision)
	req := o.Request(0)
	require.True(t, req.BirthDate.IsZero())
	require.False(t, req.CollectedAt.IsZero(), "hour precision is enough")
}

func TestExtractRejectsOtherMessages(t *testing.T) {
	m, err := Parse([]byte(seg(`MSH|^~\&|A||||||ADT^A01|1|P|2.5.1`)))
	require.NoError(t, err)
	_, err = ExtractORU(m, ExtractOptions{})
	require.ErrorIs(t, err, ErrNotORU)
}

func TestClassifyStatus(t *testing.T) {
	// HL7 v2.5.1 table 0085, Observation result status codes interpretation.
	want := map[string]StatusAction{
		"F": StatusCompute, "C": StatusCompute, "P": StatusCompute, "R": StatusCompute, "S": StatusCompute,
		"X": StatusCancel, "D": StatusRetract, "W": StatusRetract,
		"I": StatusPending, "N": StatusPending, "O": StatusPending, "U": StatusPending,
		"": StatusUnknown, "A": StatusUnknown, "f": StatusUnknown,
	}
	for code, action := range want {
		require.Equal(t, action, ClassifyStatus(code), code)
	}
}

func TestStatusesChooseMeasurements(t *testing.T) {
	m, err := Parse([]byte(seg(
		`MSH|^~\&|NVLAB|NVL|EHR|NVH|20250314093000||ORU^R01|S1|P|2.5.1`,
		`PID|1||P1||X^Y||19800101|F`,
		`OBR|1||||||20250314080000`,
		`OBX|1|NM|2160-0^Creatinine^LN||0.9|mg/dL|||||X`,
		`OBX|2|NM|33863-2^Cystatin C^LN||0.8|mg/L|||||C`,
		`OBX|3|NM|8302-2^Body height^LN||165|cm|||||I`,
	)))
	require.NoError(t, err)
	o, err := ExtractORU(m, ExtractOptions{})
	require.NoError(t, err)
	ms := o.Measurements(0)
	require.Len(t, ms, 1)
	require.Equal(t, calc.CystatinC, ms[0].Analyte)
}

func TestOBXUnit(t *testing.T) {
	msh := `MSH|^~\&|NVLAB|NVL|EHR|NVH|20250314093000||ORU^R01|U1|P|2.5.1`
	codes, err := NewCodeMap(append(DefaultCodeEntries(), CodeEntry{System: "L", Code: "CREA", Analyte: calc.Creatinine, Unit: "umol/L"})...)
	require.NoError(t, err)
	tests := []struct {
		name, obx, want string
	}{
		{"identifier", `OBX|1|NM|CREA^Creatinine^L||80|umol/L|||||F`, "umol/L"},
		{"identifier with text and system", `OBX|1|NM|CREA^Creatinine^L||0.9|mg/dL^milligram per deciliter^UCUM|||||F`, "mg/dL"},
		// HL7 v2.5.1 CE: the alternate identifier, when coded in UCUM.
		{"alternate UCUM identifier", `OBX|1|NM|CREA^Creatinine^L||0.9|^^^mg/dL^^UCUM|||||F`, "mg/dL"},
		// The configured unit applies only when OBX-6 is empty: a unit sent
		// in another component is not replaced by it (12 mg/dL must not
		// become 12 umol/L).
		{"text only: passed as sent", `OBX|1|NM|CREA^Creatinine^L||12|^mg/dL^mg/dL^UCUM|||||F`, "^mg/dL^mg/dL^UCUM"},
		{"empty: configured default", `OBX|1|NM|CREA^Creatinine^L||80||||||F`, "umol/L"},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			m, err := Parse([]byte(seg(msh, `PID|1||P1`, `OBR|1`, tt.obx)))
			require.NoError(t, err)
			o, err := ExtractORU(m, ExtractOptions{Codes: codes})
			require.NoError(t, err)
			require.Equal(t, tt.want, o.Orders[0].Observations[0].Measurement.Unit)
		})
	}
}

// Height from another order is used only when observed within a day of the
// specimen.
func TestBorrowedHeightMustBeRecent(t *testing.T) {
	msg := func(heightTime string) string {
		return seg(`MSH|^~\&|NVLAB|NVL|EHR|NVH|20250314093000||ORU^R01|H1|P|2.5.1`,
			`PID|1||P1||||20150101|M`,
			`OBR|1|||RENAL|||20250314080000`,
			`OBX|1|NM|2160-0^Creat^LN||0.6|mg/dL|||||F|||20250314080000`,
			`OBR|2|||VITALS|||`+heightTime,
			`OBX|1|NM|8302-2^Height^LN||140|cm|||||F|||`+heightTime)
	}
	for _, tc := range []struct {
		at   string
		want bool
	}{{"20250314070000", true}, {"20250313090000", true}, {"20230102090000", false}, {"", false}} {
		m, err := Parse([]byte(msg(tc.at)))
		require.NoError(t, err)
		o, err := ExtractORU(m, ExtractOptions{})
		require.NoError(t, err)
		has := false
		for _, me := range o.Request(0).Measurements {
			has = has || me.Analyte == calc.Height
		}
		require.Equal(t, tc.want, has, "height observed %q", tc.at)
	}
}
