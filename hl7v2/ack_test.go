package hl7v2

import (
	"testing"
	"time"

	"github.com/stretchr/testify/require"
)

// ackTime is a fixed clock reading for acknowledgement tests.
var ackTime = time.Date(2025, 3, 14, 9, 30, 1, 0, time.FixedZone("", 3600))

func TestBuildACK(t *testing.T) {
	orig, err := Parse([]byte(sampleORU))
	require.NoError(t, err)

	// Expected layouts follow HL7 v2.5.1 chapter 2 (original acknowledgment
	// mode, and the segment definitions of MSH, MSA and ERR): sender and receiver swapped,
	// MSH-9 ACK^<trigger>^ACK, MSA-2 the original MSH-10, ERR-3 a code from
	// table 0357 with coding system HL70357, ERR-4 severity from table 0516.
	tests := []struct {
		name string
		code string
		text string
		loc  string
		want string
	}{
		{
			name: "accept",
			code: AckAccept,
			want: seg(
				`MSH|^~\&|EHR|NVHOSP|NVLAB|NORTHFIELD VALLEY LABORATORY|20250314093001+0100||ACK^R01^ACK|ACK0001|P|2.5.1`,
				`MSA|AA|MSG00001`),
		},
		{
			name: "error with location",
			code: AckError,
			text: "store unavailable",
			loc:  "OBX^1^5",
			want: seg(
				`MSH|^~\&|EHR|NVHOSP|NVLAB|NORTHFIELD VALLEY LABORATORY|20250314093001+0100||ACK^R01^ACK|ACK0001|P|2.5.1`,
				`MSA|AE|MSG00001|store unavailable`,
				`ERR||OBX^1^5|207^Application internal error^HL70357|E||||store unavailable`),
		},
		{
			name: "reject escapes the text",
			code: AckReject,
			text: "bad | value",
			want: seg(
				`MSH|^~\&|EHR|NVHOSP|NVLAB|NORTHFIELD VALLEY LABORATORY|20250314093001+0100||ACK^R01^ACK|ACK0001|P|2.5.1`,
				`MSA|AR|MSG00001|bad \F\ value`,
				`ERR|||207^Application internal error^HL70357|E||||bad \F\ value`),
		},
		{
			name: "unknown code is sent as AR",
			code: "XX",
			want: seg(
				`MSH|^~\&|EHR|NVHOSP|NVLAB|NORTHFIELD VALLEY LABORATORY|20250314093001+0100||ACK^R01^ACK|ACK0001|P|2.5.1`,
				`MSA|AR|MSG00001`,
				`ERR|||207^Application internal error^HL70357|E`),
		},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			ack := BuildACK(orig, tt.code, tt.text, tt.loc, "ACK0001", ackTime)
			require.Equal(t, tt.want, string(ack.Encode()))
		})
	}
}

func TestBuildACKWithoutOriginal(t *testing.T) {
	// A frame without a parseable MSH still gets an AR, with the default
	// delimiters and an empty MSA-2.
	ack := BuildACKDetail(nil, AckReject, ErrorDetail{Code: ErrCodeSegmentSequence, Text: "no MSH segment"}, "ACK0002", ackTime)
	want := seg(
		`MSH|^~\&|||||20250314093001+0100||ACK|ACK0002|P|2.5.1`,
		`MSA|AR||no MSH segment`,
		`ERR|||100^Segment sequence error^HL70357|E||||no MSH segment`)
	require.Equal(t, want, string(ack.Encode()))
}

func TestBuildACKUsesOriginalDelimiters(t *testing.T) {
	orig, err := Parse([]byte(seg(`MSH#*@!$#NVLAB#NVL#EHR#NVH###ORU*R01#M2#T#2.4`)))
	require.NoError(t, err)
	ack := BuildACKDetail(orig, AckError, ErrorDetail{Code: ErrCodeRequiredField, Location: "PID^1^3", Severity: SeverityWarning, Text: "a*b"}, "A9", ackTime)
	want := seg(
		`MSH#*@!$#EHR#NVH#NVLAB#NVL#20250314093001+0100##ACK*R01*ACK#A9#T#2.4`,
		`MSA#AE#M2#a!S!b`,
		`ERR##PID*1*3#101*Required field missing*HL70357#W####a!S!b`)
	require.Equal(t, want, string(ack.Encode()))
}

func TestParseACK(t *testing.T) {
	orig, err := Parse([]byte(sampleORU))
	require.NoError(t, err)
	for _, code := range []string{AckAccept, AckError, AckReject} {
		ack := BuildACK(orig, code, "why", "", "C1", ackTime)
		got, err := ParseACK(ack.Encode())
		require.NoError(t, err)
		require.Equal(t, code, got.Code)
		require.Equal(t, "MSG00001", got.ControlID)
		require.Equal(t, code == AckAccept, got.Accepted())
		if code != AckAccept {
			require.Equal(t, "207", got.ErrorCode)
			require.Equal(t, "why", got.Text)
		}
	}

	// MSA-3 empty: the text comes from ERR-8.
	got, err := ParseACK([]byte(seg(`MSH|^~\&|B|B|A|A|20250314||ACK^R01^ACK|9|P|2.5.1`, `MSA|AE|M1`, `ERR|||207^x^HL70357|E||||from err`)))
	require.NoError(t, err)
	require.Equal(t, "from err", got.Text)

	_, err = ParseACK([]byte(seg(`MSH|^~\&|B|B|A|A|20250314||ACK|9|P|2.5.1`)))
	require.ErrorIs(t, err, ErrNoMSA)
	_, err = ParseACK([]byte(seg(`MSH|^~\&|B|B|A|A|20250314||ACK|9|P|2.5.1`, `MSA|OK|M1`)))
	require.ErrorIs(t, err, ErrAckCode)
	_, err = ParseACK([]byte("garbage"))
	require.ErrorIs(t, err, ErrNoMSH)
}
