package hl7v2

import (
	"testing"

	"github.com/stretchr/testify/require"
)

func TestSplitMessages(t *testing.T) {
	in := "MSH|^~\\&|A|B|||20260101||ORU^R01|1|P|2.5.1\nPID|1\r\n\nMSH|^~\\&|A|B|||20260101||ORU^R01|2|P|2.5.1\rOBX|1\n"
	got := SplitMessages([]byte(in))
	require.Equal(t, [][]byte{
		[]byte("MSH|^~\\&|A|B|||20260101||ORU^R01|1|P|2.5.1\rPID|1\r"),
		[]byte("MSH|^~\\&|A|B|||20260101||ORU^R01|2|P|2.5.1\rOBX|1\r"),
	}, got)
	require.Empty(t, SplitMessages([]byte("\n\r\n")))
	require.Equal(t, [][]byte{[]byte("PID|1\r")}, SplitMessages([]byte("PID|1")))
}
