package mllp

import (
	"bufio"
	"bytes"
	"io"
	"strings"
	"testing"

	"github.com/stretchr/testify/require"
)

// frame wraps a payload in MLLP block characters: <0x0B> data <0x1C><0x0D>
// (HL7 v2.5.1 Appendix C, Minimal Lower Layer Protocol).
func frame(p string) string { return "\x0b" + p + "\x1c\x0d" }

func TestReadFrame(t *testing.T) {
	tests := []struct {
		name    string
		in      string
		max     int
		want    []string // payloads in order
		wantErr error    // error after the payloads
	}{
		{name: "one frame", in: frame("MSH|x\r"), want: []string{"MSH|x\r"}, wantErr: io.EOF},
		{name: "two frames", in: frame("a") + frame("b"), want: []string{"a", "b"}, wantErr: io.EOF},
		{name: "whitespace between frames", in: "\r\n" + frame("a") + "\r\n \t" + frame("b"), want: []string{"a", "b"}, wantErr: io.EOF},
		{name: "empty payload", in: frame(""), want: []string{""}, wantErr: io.EOF},
		{name: "garbage before start", in: "xx" + frame("a"), wantErr: ErrFraming},
		{name: "end block without CR", in: "\x0babc\x1cX", wantErr: ErrFraming},
		{name: "truncated inside payload", in: "\x0babc", wantErr: io.ErrUnexpectedEOF},
		{name: "truncated after end block", in: "\x0babc\x1c", wantErr: io.ErrUnexpectedEOF},
		{name: "exactly the limit", in: frame("12345"), max: 5, want: []string{"12345"}, wantErr: io.EOF},
		// A cut-off frame followed by a new one: the two messages are not
		// merged; only the complete one is delivered.
		{name: "start block inside a frame", in: "\x0bMSH|cut off" + frame("MSH|whole"), want: []string{"MSH|whole"}, wantErr: io.EOF},
		{name: "large payload across buffer refills", in: frame(strings.Repeat("x", 10000)), want: []string{strings.Repeat("x", 10000)}, wantErr: io.EOF},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			br := bufio.NewReaderSize(strings.NewReader(tt.in), 16)
			for _, w := range tt.want {
				got, err := ReadFrame(br, tt.max)
				require.NoError(t, err)
				require.Equal(t, w, string(got))
			}
			_, err := ReadFrame(br, tt.max)
			require.ErrorIs(t, err, tt.wantErr)
		})
	}
}

func TestReadFrameTooLargeKeepsStreamInStep(t *testing.T) {
	big := "MSH|^~\\&|head" + strings.Repeat("y", 100)
	br := bufio.NewReaderSize(strings.NewReader(frame(big)+frame("next")), 16)
	head, err := ReadFrame(br, 20)
	require.ErrorIs(t, err, ErrFrameTooLarge)
	require.Equal(t, big[:20], string(head), "the first max bytes are returned")
	got, err := ReadFrame(br, 20)
	require.NoError(t, err)
	require.Equal(t, "next", string(got))
}

func TestWriteFrame(t *testing.T) {
	var b bytes.Buffer
	require.NoError(t, WriteFrame(&b, []byte("MSA|AA|1\r")))
	require.Equal(t, []byte("\x0bMSA|AA|1\r\x1c\x0d"), b.Bytes())
}
