package hl7v2

import (
	"testing"

	"github.com/stretchr/testify/require"
)

func TestEncodeText(t *testing.T) {
	d := DefaultDelimiters()
	// Escape sequences of HL7 v2.5.1 chapter 2, section 2.7.
	tests := []struct{ in, want string }{
		{"plain", "plain"},
		{"a|b", `a\F\b`},
		{"a^b", `a\S\b`},
		{"a&b", `a\T\b`},
		{"a~b", `a\R\b`},
		{`a\b`, `a\E\b`},
		{"line1\nline2", `line1\.br\line2`},
		{"cr\r", `cr\X0D\`},
		{"#", "#"}, // no truncation character declared
		{"", ""},
	}
	for _, tt := range tests {
		require.Equal(t, tt.want, d.EncodeText(tt.in), tt.in)
		require.Equal(t, tt.in, d.DecodeText(tt.want), tt.want)
	}
}

func TestDecodeText(t *testing.T) {
	d := DefaultDelimiters()
	tests := []struct{ in, want string }{
		{`\F\\S\\T\\R\\E\`, `|^&~\`},
		{`a\.br\b`, "a\nb"},
		{`\X0D0A\`, "\r\n"},
		{`\X41\`, "A"},
		{`\X4\`, `\X4\`},             // odd number of hex digits: kept
		{`\XZZ\`, `\XZZ\`},           // not hex: kept
		{`\H\bold\N\`, `\H\bold\N\`}, // highlighting: kept
		{`\.sp\`, `\.sp\`},           // other formatting: kept
		{`\Zlocal\`, `\Zlocal\`},     // locally defined: kept
		{`open \F`, `open \F`},       // unterminated: kept
		{`\P\`, `\P\`},               // no truncation character declared
		{`\\`, `\\`},                 // empty sequence: kept
		{`x\E\F\E\`, `x\F\`},         // escaped escape is literal
		{"no escapes at all", "no escapes at all"},
	}
	for _, tt := range tests {
		require.Equal(t, tt.want, d.DecodeText(tt.in), tt.in)
	}
	d.Truncation = '#'
	require.Equal(t, "#", d.DecodeText(`\P\`))
	require.Equal(t, `a\P\b`, d.EncodeText("a#b"))
}

func TestComponents(t *testing.T) {
	d := DefaultDelimiters()
	require.Equal(t, `2160-0^Creatinine \T\ more^LN`, d.Components("2160-0", "Creatinine & more", "LN"))
	require.Equal(t, "a^^c", d.Components("a", "", "c", "", ""))
	require.Equal(t, "", d.Components("", ""))
	require.Equal(t, `x&y\S\z`, d.Subcomponents("x", "y^z"))
}

func TestValidate(t *testing.T) {
	require.NoError(t, DefaultDelimiters().Validate())
	bad := []Delimiters{
		{},
		{Field: '|', Component: '|', Repetition: '~', Escape: '\\', Subcomponent: '&'},
		{Field: '|', Component: 'A', Repetition: '~', Escape: '\\', Subcomponent: '&'},
		{Field: '|', Component: '^', Repetition: '~', Escape: '\\', Subcomponent: '&', Truncation: '^'},
		{Field: '\r', Component: '^', Repetition: '~', Escape: '\\', Subcomponent: '&'},
	}
	for _, d := range bad {
		require.Error(t, d.Validate(), "%+v", d)
	}
	require.Equal(t, `^~\&`, DefaultDelimiters().EncodingCharacters())
}
