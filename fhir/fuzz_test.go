package fhir

import (
	"errors"
	"os"
	"path/filepath"
	"testing"
	"time"

	ppb "github.com/google/fhir/go/proto/google/fhir/proto/r4/core/resources/patient_go_proto"

	"filtrate/calc"
)

// FuzzDecode feeds arbitrary bodies to the request decoder. Whatever the
// input: no panic; a refusal is an *InputError with a 4xx status; an
// accepted request extracts without panicking, and its answer and
// forwarded Bundle pass google/fhir/go validation.
//
// Smoke run: go test ./fhir -run '^$' -fuzz FuzzDecode -fuzztime 15s
func FuzzDecode(f *testing.F) {
	seeds, err := filepath.Glob(filepath.Join("..", "testdata", "fhir", "*.request.json"))
	if err != nil {
		f.Fatal(err)
	}
	for _, s := range seeds {
		b, err := os.ReadFile(s)
		if err != nil {
			f.Fatal(err)
		}
		f.Add(b)
	}
	f.Add([]byte(`{}`))
	f.Add([]byte(`{"resourceType": "Bundle", "type": "collection", "entry": [{"resource": {"resourceType": "Observation", "status": "final", "code": {"text": "x"}, "subject": {"reference": "#p"}}}]}`))
	c := newCodec(f)
	cl := calc.NewCalculator(calc.Builtin())
	pol, err := calc.Preset("nkf-asn-2021")
	if err != nil {
		f.Fatal(err)
	}
	meta := Meta{Now: time.Date(2024, 7, 1, 12, 0, 0, 0, time.UTC), SoftwareVersion: "fuzz", ConfigHash: "h"}
	f.Fuzz(func(t *testing.T, body []byte) {
		for _, at := range []Endpoint{EndpointBundle, EndpointObservation} {
			req, err := c.Decode(body, at)
			if err != nil {
				checkInputError(t, err)
				continue
			}
			x, err := req.Extract(ExtractOptions{LookupPatient: func(string) (*ppb.Patient, error) { return nil, ErrPatientNotFound }})
			if err != nil {
				checkInputError(t, err)
				continue
			}
			res := make([]GroupResult, len(x.Groups))
			for i, g := range x.Groups {
				r := g.Request
				r.Policy = pol
				res[i].Outcome = cl.Evaluate(r)
			}
			answer, err := c.Response(x, res, meta)
			if err != nil {
				t.Fatalf("answer: %v", err)
			}
			if err := c.Validate(answer); err != nil {
				t.Fatalf("answer fails validation: %v\n%s", err, answer)
			}
			_, fw, err := c.Forward(x, res, meta)
			if err != nil {
				t.Fatalf("forward: %v", err)
			}
			if err := c.Validate(fw); err != nil {
				t.Fatalf("forwarded bundle fails validation: %v\n%s", err, fw)
			}
		}
	})
}

func checkInputError(t *testing.T, err error) {
	t.Helper()
	var ie *InputError
	if !errors.As(err, &ie) {
		t.Fatalf("error is not an *InputError: %T %v", err, err)
	}
	if ie.Status < 400 || ie.Status > 499 || len(ie.Issues) == 0 {
		t.Fatalf("refusal with status %d and %d issues", ie.Status, len(ie.Issues))
	}
}
