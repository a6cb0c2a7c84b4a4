package hl7v2

import (
	"errors"
	"strings"
	"testing"

	"github.com/stretchr/testify/require"
)

// seg joins segments with carriage returns, the HL7 segment terminator
// (HL7 v2.5.1 chapter 2), ending with one.
func seg(lines ...string) string { return strings.Join(lines, "\r") + "\r" }

// sampleORU is an invented result message from the invented "Northfield
// Valley Laboratory" about an invented patient.
var sampleORU = seg(
	`MSH|^~\&|NVLAB|NORTHFIELD VALLEY LABORATORY|EHR|NVHOSP|20250314093000+0100||ORU^R01^ORU_R01|MSG00001|P|2.5.1`,
	`PID|1||NVL0000123^^^NVL^MR~998877^^^NVHOSP^PI||Marlowe^Ione^^^^^L||19610523|F`,
	`OBR|1|ORD1001|NVL555001|CHEM^Chemistry panel^L|||20250314081500+0100`,
	`OBX|1|NM|2160-0^Creatinine [Mass/volume] in Serum or Plasma^LN||0.92|mg/dL^^UCUM|0.51-0.95||||F|||20250314081500+0100||ENZ^Enzymatic^L|NV-CHEM-01`,
	`NTE|1|L|Slightly haemolysed \T\ icteric`,
	`OBX|2|ST|ZCOMMENT^Comment^L||See \.br\ note \F\ pipe|||||||F`,
	`ZNV|custom|data^with^components||`,
)

func TestParseAndEncodeIsLossless(t *testing.T) {
	tests := []struct {
		name string
		in   string
		want string // "" means same as in
	}{
		{name: "carriage returns", in: sampleORU},
		{name: "line feeds become carriage returns", in: strings.ReplaceAll(sampleORU, "\r", "\n"), want: sampleORU},
		{name: "CRLF becomes CR", in: strings.ReplaceAll(sampleORU, "\r", "\r\n"), want: sampleORU},
		{name: "missing final terminator is added", in: strings.TrimSuffix(sampleORU, "\r"), want: sampleORU},
		{name: "blank lines dropped", in: strings.ReplaceAll(sampleORU, "\r", "\r\r\n"), want: sampleORU},
		{name: "trailing empty fields kept", in: seg(`MSH|^~\&|A|||||||X|P|2.5.1|||`, `ZZZ|||`, `NTE`)},
		{name: "unknown escapes kept", in: seg(`MSH|^~\&|A||||||ORU^R01|1|P|2.5.1`, `NTE|1||\H\bold\N\ \Zlocal\ \`)},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			m, err := Parse([]byte(tt.in))
			require.NoError(t, err)
			want := tt.want
			if want == "" {
				want = tt.in
			}
			require.Equal(t, want, string(m.Encode()))
		})
	}
}

func TestDelimitersComeFromMSH(t *testing.T) {
	// Unusual but valid delimiters: field '#', component '*', repetition
	// '@', escape '!', subcomponent '$' (HL7 v2.5.1 chapter 2 lets the
	// sender choose them in MSH-1 and MSH-2).
	in := seg(
		`MSH#*@!$#NVLAB#NVL#####ORU*R01#M2#P#2.5.1`,
		`PID#1##A1*x*y*NVL$urn:nvl*MR@B2##Quillfeather*Bram`,
		`NTE#1#L#caret ^ and pipe | are plain here!F!and !S! escapes`,
	)
	m, err := Parse([]byte(in))
	require.NoError(t, err)
	require.Equal(t, Delimiters{Field: '#', Component: '*', Repetition: '@', Escape: '!', Subcomponent: '$'}, m.Delimiters())
	require.Equal(t, "#", m.MSH().Field(1).String())
	require.Equal(t, "*@!$", m.MSH().Field(2).String())
	code, event, _ := m.Type()
	require.Equal(t, "ORU", code)
	require.Equal(t, "R01", event)
	require.Equal(t, "M2", m.ControlID())
	pid := m.First("PID")
	require.Equal(t, 2, pid.Field(3).Reps())
	require.Equal(t, "A1", pid.Field(3).String())
	require.Equal(t, "NVL", pid.Field(3).Component(4).Sub(1))
	require.Equal(t, "urn:nvl", pid.Field(3).Component(4).Sub(2))
	require.Equal(t, "B2", pid.Field(3).Rep(2).String())
	require.Equal(t, "caret ^ and pipe | are plain here#and * escapes", m.First("NTE").Field(3).String())
	require.Equal(t, in, string(m.Encode()))
}

func TestTruncationCharacter(t *testing.T) {
	// HL7 v2.7 adds a fifth encoding character, the truncation character,
	// escaped as \P\.
	m, err := Parse([]byte(seg(`MSH|^~\&#|A||||||ORU^R01|1|P|2.7`, `NTE|1||a\P\b`)))
	require.NoError(t, err)
	require.Equal(t, byte('#'), m.Delimiters().Truncation)
	require.Equal(t, "a#b", m.First("NTE").Field(3).String())
	require.Equal(t, `^~\&#`, m.MSH().Field(2).String())
}

func TestFieldAccessors(t *testing.T) {
	m, err := Parse([]byte(sampleORU))
	require.NoError(t, err)
	msh := m.MSH()
	require.Equal(t, "MSH", msh.Name())
	require.Equal(t, "|", msh.Field(1).String())
	require.Equal(t, `^~\&`, msh.Field(2).String())
	require.Equal(t, 1, msh.Field(2).Components())
	require.Equal(t, "NVLAB", msh.Field(3).String())
	require.Equal(t, "MSG00001", m.ControlID())
	require.Equal(t, "2.5.1", m.Version())
	_, _, structure := m.Type()
	require.Equal(t, "ORU_R01", structure)

	pid := m.First("PID")
	require.Equal(t, "NVL0000123^^^NVL^MR~998877^^^NVHOSP^PI", pid.Field(3).Raw())
	require.Equal(t, 2, pid.Field(3).Reps())
	require.Equal(t, "NVL0000123", pid.Field(3).String())
	require.Equal(t, "NVL", pid.Field(3).Component(4).String())
	require.Equal(t, "MR", pid.Field(3).Component(5).String())
	require.Equal(t, "998877", pid.Field(3).Rep(2).Component(1).String())
	require.Equal(t, "PI", pid.Field(3).Rep(2).Component(5).String())
	require.Equal(t, 7, pid.Field(5).Components())
	require.Equal(t, "", pid.Field(3).Rep(3).String())
	require.Equal(t, "", pid.Field(99).String())
	require.True(t, pid.Field(99).IsEmpty())
	require.Equal(t, 0, pid.Field(2).Reps())

	notes := m.First("NTE")
	require.Equal(t, "Slightly haemolysed & icteric", notes.Field(3).String())
	require.Equal(t, `Slightly haemolysed \T\ icteric`, notes.Field(3).Raw())
	obx2 := m.Segment(5)
	require.Equal(t, "See \n note | pipe", obx2.Field(5).String())

	z := m.First("ZNV")
	require.Equal(t, "components", z.Field(2).Component(3).String())
	require.Equal(t, 4, z.NumFields())
}

func TestExplicitNull(t *testing.T) {
	m, err := Parse([]byte(seg(`MSH|^~\&|A||||||ORU^R01|1|P|2.5.1`, `OBX|1|NM|X^Y^L||""`)))
	require.NoError(t, err)
	require.True(t, m.Segment(1).Field(5).IsNull())
	require.False(t, m.Segment(1).Field(4).IsNull())
}

func TestModifiedSegmentsOnlyAreReencoded(t *testing.T) {
	m, err := Parse([]byte(sampleORU))
	require.NoError(t, err)
	obx := m.Segment(3)
	require.NoError(t, obx.SetValue(5, "1.05"))
	require.True(t, obx.Modified())
	require.False(t, m.Segment(4).Modified())

	// Setting a field to its current text changes nothing.
	require.NoError(t, m.Segment(2).SetField(1, "1"))
	require.False(t, m.Segment(2).Modified())

	want := strings.Replace(sampleORU, "LN||0.92|mg/dL", "LN||1.05|mg/dL", 1)
	require.Equal(t, want, string(m.Encode()))

	// Extending a segment adds empty fields.
	z := m.First("ZNV")
	require.NoError(t, z.SetValue(7, "a|b"))
	require.Equal(t, `ZNV|custom|data^with^components|||||a\F\b`, z.String())

	require.ErrorIs(t, z.SetField(2, "x|y"), ErrFieldText)
	require.ErrorIs(t, z.SetField(2, "x\ry"), ErrFieldText)
	require.Error(t, m.MSH().SetField(2, "^~"))
}

func TestInsertAndClone(t *testing.T) {
	m, err := Parse([]byte(sampleORU))
	require.NoError(t, err)
	c := m.Clone()
	d := m.Delimiters()
	c.Insert(4, NewSegment(d, "NTE", "9", "L", d.EncodeText("added ^ note")))
	require.NoError(t, c.Segment(3).SetValue(5, "2.00"))
	c.Append(NewSegment(d, "ZZZ"))

	require.Equal(t, sampleORU, string(m.Encode()), "the original is untouched")
	want := strings.Replace(sampleORU, `NTE|1|L|Slightly`, `NTE|9|L|added \S\ note`+"\r"+`NTE|1|L|Slightly`, 1)
	want = strings.Replace(want, "LN||0.92|", "LN||2.00|", 1) + "ZZZ\r"
	require.Equal(t, want, string(c.Encode()))

	require.Panics(t, func() { c.Insert(0, NewSegment(d, "NTE")) }, "nothing goes before MSH")
	require.Panics(t, func() { c.Append(NewSegment(d, "MSH")) })
	require.Panics(t, func() {
		c.Append(NewSegment(Delimiters{Field: '#', Component: '*', Repetition: '@', Escape: '!', Subcomponent: '$'}, "NTE"))
	})
	require.Panics(t, func() { NewSegment(d, "nte") })
}

func TestNewMSHSegment(t *testing.T) {
	d := DefaultDelimiters()
	s := NewSegment(d, "MSH", "APP", "FAC")
	require.Equal(t, `MSH|^~\&|APP|FAC`, s.String())
	require.Equal(t, "APP", s.Field(3).String())
}

func TestParseErrors(t *testing.T) {
	msh := `MSH|^~\&|A||||||ORU^R01|1|P|2.5.1`
	tests := []struct {
		name    string
		in      string
		limits  Limits
		want    error
		segment int
		segType string
		field   int
		code    string
		loc     string
	}{
		{name: "empty", in: "\r\n", want: ErrEmpty, code: "100"},
		{name: "no MSH", in: seg(`PID|1`), want: ErrNoMSH, segment: 1, code: "100"},
		{name: "MSH-2 too short", in: seg(`MSH|^~\|A`), want: ErrDelimiters, segment: 1, segType: "MSH", field: 2, code: "207", loc: "MSH^1^2"},
		{name: "MSH-2 repeats a delimiter", in: seg(`MSH|^^\&|A`), want: ErrDelimiters, segment: 1, segType: "MSH", field: 2, code: "207"},
		{name: "letter as delimiter", in: seg(`MSH|^~\A|A`), want: ErrDelimiters, segment: 1, segType: "MSH", field: 2},
		{name: "only MSH", in: "MSH", want: ErrDelimiters, segment: 1, segType: "MSH", field: 1},
		{name: "bad segment name", in: seg(msh, `PID|1`, `pid|2`), want: ErrSegmentName, segment: 3, code: "100"},
		{name: "segment name too long", in: seg(msh, `PIDX|1`), want: ErrSegmentName, segment: 2},
		{name: "second MSH", in: seg(msh, `PID|1`, msh), want: ErrUnexpectedMSH, segment: 3, segType: "MSH", code: "100", loc: "MSH^2"},
		{name: "too large", in: seg(msh, `PID|1`), limits: Limits{MaxMessageBytes: 10}, want: ErrMessageTooLarge, code: "207"},
		{name: "too many segments", in: seg(msh, `NTE|1`, `NTE|2`, `NTE|3`), limits: Limits{MaxSegments: 3}, want: ErrTooManySegments, segment: 4},
		{name: "too many fields", in: seg(msh, `NTE|1`, `NTE|1|2|3|4|5|6|7|8|9|10|11|12|13`), limits: Limits{MaxFields: 12}, want: ErrTooManyFields, segment: 3, segType: "NTE", field: 13, loc: "NTE^2^13"},
		{name: "too many fields in MSH", in: seg(msh), limits: Limits{MaxFields: 11}, want: ErrTooManyFields, segment: 1, segType: "MSH", field: 12},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			_, err := ParseLimits([]byte(tt.in), tt.limits)
			require.ErrorIs(t, err, tt.want)
			var pe *ParseError
			require.True(t, errors.As(err, &pe))
			require.Equal(t, tt.segment, pe.Segment)
			require.Equal(t, tt.segType, pe.SegmentType)
			require.Equal(t, tt.field, pe.Field)
			if tt.code != "" {
				require.Equal(t, tt.code, pe.Code())
			}
			if tt.loc != "" {
				require.Equal(t, tt.loc, pe.Location())
			}
		})
	}
}

func TestParseErrorMessage(t *testing.T) {
	err := &ParseError{Segment: 3, SegmentType: "PID", Sequence: 1, Field: 501, Err: ErrTooManyFields}
	require.Equal(t, "hl7v2: segment 3 (PID) field 501: segment exceeds the field limit", err.Error())
	require.Equal(t, "hl7v2: message exceeds the size limit", (&ParseError{Err: ErrMessageTooLarge}).Error())
}

// TestParseErrorsCarryNoPatientData feeds broken PID segments holding an
// invented patient's name, identifier and date of birth, and checks that
// none of it reaches the error text (DESIGN.md, "Patient data never goes into
// an error string").
func TestParseErrorsCarryNoPatientData(t *testing.T) {
	msh := `MSH|^~\&|NVLAB|NVL|||20250314093000||ORU^R01|MSG9|P|2.5.1`
	pid := `PID|1||NVL0000456^^^NVL^MR||Quillfeather^Bram||19790102|M` + strings.Repeat("|", 40)
	secrets := []string{"Quillfeather", "Bram", "NVL0000456", "19790102"}
	inputs := map[string]struct {
		in  string
		lim Limits
	}{
		"too many fields":    {in: seg(msh, pid), lim: Limits{MaxFields: 20}},
		"name in segment ID": {in: seg(msh, "Quillfeather^Bram|NVL0000456|19790102")},
		"lower-case PID":     {in: seg(msh, "pid|1||NVL0000456||Quillfeather^Bram||19790102")},
		"PID before MSH":     {in: seg("PID|1||NVL0000456||Quillfeather^Bram||19790102", msh)},
	}
	for name, tc := range inputs {
		t.Run(name, func(t *testing.T) {
			_, err := ParseLimits([]byte(tc.in), tc.lim)
			require.Error(t, err)
			for _, s := range secrets {
				require.NotContains(t, err.Error(), s)
			}
		})
	}
	_, err := ParseDTM("19790132", nil)
	require.ErrorIs(t, err, ErrDTM)
	require.NotContains(t, err.Error(), "19790132")
}

func TestParseMSH(t *testing.T) {
	// The rest of the message may be broken; ParseMSH reads only the header.
	m, err := ParseMSH([]byte("\r\n" + `MSH|^~\&|NVLAB|NVL|||20250314093000||ORU^R01|MSG7|P|2.5.1` + "\rbroken segment\r"))
	require.NoError(t, err)
	require.Equal(t, "MSG7", m.ControlID())
	require.Equal(t, 1, m.Len())
}
