package hl7v2

import (
	"strings"
	"testing"
)

// FuzzParse checks that parsing never panics and that encoding is stable:
// parse → encode → parse gives the same segments and fields, and a second
// encode gives the same bytes. It also checks EncodeText/DecodeText round
// trips on field text. Run briefly: go test -fuzz FuzzParse -fuzztime 20s.
func FuzzParse(f *testing.F) {
	f.Add([]byte(sampleORU))
	f.Add([]byte(seg(`MSH#*@!$#NVLAB#NVL#####ORU*R01#M2#P#2.5.1`, `PID#1##A1*x@B2`)))
	f.Add([]byte(seg(`MSH|^~\&#|A||||||ORU^R01|1|P|2.7`, `NTE|1||a\P\b\X0D0A\`)))
	f.Add([]byte("MSH|^~\\&\nPID|1\r\nZZ9|\\E\\\\.br\\"))
	f.Add([]byte("MSH"))
	f.Add([]byte(""))
	f.Fuzz(func(t *testing.T, data []byte) {
		m1, err := ParseLimits(data, Limits{MaxMessageBytes: 1 << 16, MaxSegments: 200, MaxFields: 200})
		if err != nil {
			return
		}
		enc1 := m1.Encode()
		m2, err := Parse(enc1)
		if err != nil {
			t.Fatalf("re-parse failed: %v", err)
		}
		if m1.Len() != m2.Len() || m1.Delimiters() != m2.Delimiters() {
			t.Fatalf("segments or delimiters differ after round trip")
		}
		for i := 0; i < m1.Len(); i++ {
			a, b := m1.Segment(i), m2.Segment(i)
			if strings.Join(a.fields, "\x00") != strings.Join(b.fields, "\x00") {
				t.Fatalf("segment %d differs after round trip", i+1)
			}
			for n := 1; n <= a.NumFields(); n++ {
				v := a.Field(n).String()
				d := m1.Delimiters()
				if got := d.DecodeText(d.EncodeText(v)); got != v {
					t.Fatalf("escape round trip changed a value")
				}
			}
		}
		if enc2 := m2.Encode(); string(enc1) != string(enc2) {
			t.Fatalf("encoding is not stable")
		}
		c := m1.Clone()
		if c.Len() > 1 {
			_ = c.Segment(c.Len()-1).SetValue(c.Segment(c.Len()-1).NumFields()+1, "x|y^z")
			if _, err := Parse(c.Encode()); err != nil {
				t.Fatalf("modified message does not parse: %v", err)
			}
		}
	})
}
