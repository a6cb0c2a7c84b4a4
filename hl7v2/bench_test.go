package hl7v2

import (
	"os"
	"path/filepath"
	"testing"

	"filtrate/calc"
)

func benchInput(b *testing.B, name string) []byte {
	b.Helper()
	data, err := os.ReadFile(filepath.Join("testdata", name))
	if err != nil {
		b.Fatal(err)
	}
	return data
}

func BenchmarkParse(b *testing.B) {
	data := benchInput(b, "oru_crcys_capped.hl7")
	b.SetBytes(int64(len(data)))
	b.ReportAllocs()
	for b.Loop() {
		if _, err := Parse(data); err != nil {
			b.Fatal(err)
		}
	}
}

func BenchmarkEncodeUnchanged(b *testing.B) {
	m, err := Parse(benchInput(b, "oru_crcys_capped.hl7"))
	if err != nil {
		b.Fatal(err)
	}
	b.ReportAllocs()
	for b.Loop() {
		_ = m.Encode()
	}
}

// BenchmarkParseEnrichEncode measures the transport work for one typical
// result message: parse, extract, write two eGFR results in, encode.
func BenchmarkParseEnrichEncode(b *testing.B) {
	data := benchInput(b, "oru_crcys_capped.hl7")
	capped := result(egfrCrCys, ">90", "G1", commentSteady)
	capped.Capped = true
	outcomes := []*calc.Outcome{{
		Inputs: []calc.InputUse{
			{Analyte: calc.Creatinine, SourceID: "OBR1/OBX1"},
			{Analyte: calc.CystatinC, SourceID: "OBR1/OBX2"},
		},
		Results: []calc.Result{result(egfrCr, "88", "G2", commentSteady), capped},
	}, nil}
	codes := DefaultCodeMap()
	b.SetBytes(int64(len(data)))
	b.ReportAllocs()
	for b.Loop() {
		m, err := Parse(data)
		if err != nil {
			b.Fatal(err)
		}
		o, err := ExtractORU(m, ExtractOptions{Codes: codes})
		if err != nil {
			b.Fatal(err)
		}
		out, err := o.Enrich(outcomes, EnrichOptions{})
		if err != nil {
			b.Fatal(err)
		}
		_ = out.Encode()
	}
}

func BenchmarkBuildACK(b *testing.B) {
	m, err := Parse(benchInput(b, "oru_crcys_capped.hl7"))
	if err != nil {
		b.Fatal(err)
	}
	b.ReportAllocs()
	for b.Loop() {
		_ = BuildACK(m, AckAccept, "", "", "A1", ackTime).Encode()
	}
}
