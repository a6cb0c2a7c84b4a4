package fhir

import (
	"bytes"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"net/http"
	"reflect"
	"regexp"
	"strconv"
	"strings"
	"unicode/utf8"

	"github.com/google/fhir/go/fhirversion"
	"github.com/google/fhir/go/jsonformat"
	cpb "github.com/google/fhir/go/proto/google/fhir/proto/r4/core/codes_go_proto"
	bcrpb "github.com/google/fhir/go/proto/google/fhir/proto/r4/core/resources/bundle_and_contained_resource_go_proto"
	ppb "github.com/google/fhir/go/proto/google/fhir/proto/r4/core/resources/patient_go_proto"
)

// Endpoint is what a request was posted to.
type Endpoint int

// Endpoints.
const (
	// EndpointBundle is POST [base]: the body is a Bundle.
	EndpointBundle Endpoint = iota + 1
	// EndpointObservation is POST [base]/Observation: the body is one
	// Observation.
	EndpointObservation
)

// maxNesting bounds the depth of JSON objects the unmarshaller follows.
const maxNesting = 64

// Codec parses, validates and writes FHIR R4 JSON with google/fhir/go. It
// is safe for concurrent use.
type Codec struct {
	um *jsonformat.Unmarshaller
	m  *jsonformat.Marshaller
}

// NewCodec returns a Codec. Times without a zone (dates) are read as UTC
// calendar dates.
func NewCodec() (*Codec, error) {
	um, err := jsonformat.NewUnmarshaller("UTC", fhirversion.R4)
	if err != nil {
		return nil, fmt.Errorf("fhir: unmarshaller: %w", err)
	}
	um.MaxNestingDepth = maxNesting
	m, err := jsonformat.NewMarshaller(false, "", "", fhirversion.R4)
	if err != nil {
		return nil, fmt.Errorf("fhir: marshaller: %w", err)
	}
	return &Codec{um: um, m: m}, nil
}

// Issue is one OperationOutcome issue.
type Issue struct {
	// Severity is fatal, error, warning or information.
	Severity string
	// Code is the FHIR IssueType code: structure, required, value,
	// invalid, not-supported, not-found, business-rule, informational,
	// transient, exception, too-long, duplicate.
	Code string
	// Reason, when set, is a refusal reason code (urn:filtrate:refusal).
	Reason string
	// Details is plain text without patient data.
	Details string
	// Diagnostics is extra detail for the sender; it may echo content of
	// the request and is never logged.
	Diagnostics string
	// Expression names the elements concerned (FHIRPath).
	Expression []string
	// Location is used for JSON syntax errors ("line 3, column 14").
	Location []string
}

// InputError reports a request that cannot be accepted as it is. Its
// Error string holds no patient data and no request content.
type InputError struct {
	// Status is the HTTP status to answer: 400, 413, 415 or 422.
	Status int
	Issues []Issue
	// Err is the underlying error, if any.
	Err error
	// path is the element of the first issue as the schema names it
	// (no request content), for Error.
	path string
}

// Error names the first issue and the element, without request content.
func (e *InputError) Error() string {
	msg := "fhir: request refused"
	if len(e.Issues) > 0 {
		msg += ": " + e.Issues[0].Details
	}
	if e.path != "" {
		msg += " (at " + e.path + ")"
	}
	if n := len(e.Issues) - 1; n > 0 {
		msg += fmt.Sprintf(" and %d more issue(s)", n)
	}
	return msg
}

// Unwrap returns the underlying error.
func (e *InputError) Unwrap() error { return e.Err }

func inputError(status int, code, details, expr string) *InputError {
	is := Issue{Severity: "error", Code: code, Details: details}
	if expr != "" {
		is.Expression = []string{expr}
	}
	return &InputError{Status: status, Issues: []Issue{is}, path: expr}
}

// Bundle types accepted by POST [base].
var acceptedBundleTypes = map[cpb.BundleTypeCode_Value]bool{
	cpb.BundleTypeCode_TRANSACTION: true,
	cpb.BundleTypeCode_BATCH:       true,
	cpb.BundleTypeCode_COLLECTION:  true,
}

// Decode parses and validates a request body posted to at. Every problem
// with the body is an *InputError (400 for JSON and FHIR validation
// errors and a resource type the endpoint does not take, 422 for an
// unsupported Bundle type).
func (c *Codec) Decode(body []byte, at Endpoint) (*Request, error) {
	want := "Bundle"
	if at == EndpointObservation {
		want = "Observation"
	} else if at != EndpointBundle {
		return nil, fmt.Errorf("fhir: unknown endpoint %d", at)
	}
	cr, err := c.decodeResource(body, want)
	if err != nil {
		return nil, err
	}
	sum := sha256.Sum256(body)
	req := &Request{Endpoint: at, BodyHash: hex.EncodeToString(sum[:])}
	if at == EndpointObservation {
		req.entries = []*entry{{index: -1, expr: "Observation", res: cr}}
		return req, nil
	}
	b := cr.GetBundle()
	bt := b.GetType().GetValue()
	if !acceptedBundleTypes[bt] {
		e := inputError(http.StatusUnprocessableEntity, "not-supported",
			"unsupported Bundle type: filtrate accepts transaction, batch and collection Bundles", "Bundle.type")
		e.Issues[0].Diagnostics = "Bundle.type is " + strconv.Quote(enumCode(bt.String()))
		return nil, e
	}
	req.BundleType = enumCode(bt.String())
	if id := b.GetIdentifier(); id != nil && id.GetValue().GetValue() != "" {
		req.Identifier = id.GetSystem().GetValue() + "|" + id.GetValue().GetValue()
	}
	req.nEntries = len(b.GetEntry())
	for i, e := range b.GetEntry() {
		if e.GetResource() == nil {
			continue // e.g. a DELETE in a transaction: nothing to calculate or forward
		}
		req.entries = append(req.entries, &entry{
			index:   i,
			expr:    fmt.Sprintf("Bundle.entry[%d].resource", i),
			fullURL: e.GetFullUrl().GetValue(),
			res:     e.GetResource(),
			request: e.GetRequest(),
		})
	}
	return req, nil
}

// DecodePatient parses and validates a Patient, as answered by a patient
// source for GET [base]/Patient/[id].
func (c *Codec) DecodePatient(body []byte) (*ppb.Patient, error) {
	cr, err := c.decodeResource(body, "Patient")
	if err != nil {
		return nil, err
	}
	return cr.GetPatient(), nil
}

// Validate parses body as any FHIR R4 resource with full validation.
func (c *Codec) Validate(body []byte) error {
	_, err := c.decodeResource(body, "")
	return err
}

// decodeResource checks the JSON, the resource type (when want is set)
// and then unmarshals with validation.
func (c *Codec) decodeResource(body []byte, want string) (*bcrpb.ContainedResource, error) {
	if !utf8.Valid(body) {
		return nil, inputError(http.StatusBadRequest, "structure", "the request body is not valid UTF-8", "")
	}
	var top map[string]json.RawMessage
	if err := json.Unmarshal(body, &top); err != nil {
		e := inputError(http.StatusBadRequest, "structure", "the request body is not a JSON object", "")
		var se *json.SyntaxError
		if errors.As(err, &se) {
			e.Issues[0].Details = "the request body is not valid JSON"
			e.Issues[0].Diagnostics = "the request body is not valid JSON: " + se.Error()
			e.Issues[0].Location = []string{lineColumn(body, se.Offset)}
		}
		e.Err = err
		return nil, e
	}
	var rt string
	if raw, ok := top["resourceType"]; !ok || json.Unmarshal(raw, &rt) != nil || rt == "" {
		return nil, inputError(http.StatusBadRequest, "required", "resourceType is missing", "resourceType")
	}
	if want != "" && rt != want {
		e := inputError(http.StatusBadRequest, "invalid", "this endpoint accepts "+want+" resources only", "resourceType")
		e.Issues[0].Diagnostics = "resourceType is " + strconv.Quote(rt)
		return nil, e
	}
	m, err := c.um.Unmarshal(body)
	if err != nil {
		return nil, validationError(err)
	}
	cr, ok := m.(*bcrpb.ContainedResource)
	if !ok {
		return nil, fmt.Errorf("fhir: unmarshaller returned %T", m)
	}
	return cr, nil
}

// lineColumn names the byte before offset off (the one a JSON syntax
// error stopped at) as "line L, column C", both from 1.
func lineColumn(body []byte, off int64) string {
	off--
	if off < 0 {
		off = 0
	}
	if off > int64(len(body)) {
		off = int64(len(body))
	}
	before := body[:off]
	line := bytes.Count(before, []byte("\n")) + 1
	col := off - int64(bytes.LastIndexByte(before, '\n'))
	return fmt.Sprintf("line %d, column %d", line, col)
}

// typeStep matches the resource type that jsonformat writes into element
// paths after a resource container ("Bundle.entry[0].resource.Observation.
// status"); FHIRPath has no such step.
var typeStep = regexp.MustCompile(`\.(resource|contained\[\d+\]|outcome)\.[A-Z][A-Za-z]*(\.|$)`)

// fhirPath turns a jsonformat element path into a FHIRPath expression.
func fhirPath(p string) string {
	for {
		q := typeStep.ReplaceAllString(p, ".$1$2")
		if q == p {
			return strings.TrimSuffix(q, ".")
		}
		p = q
	}
}

// validationError turns google/fhir/go's unmarshal errors into an
// InputError. jsonformat's UnmarshalError (an internal type) keeps the
// element path, a message without patient data (Details) and the offending
// content (Diagnostics) apart; its exported fields are read by reflection.
func validationError(err error) *InputError {
	e := &InputError{Status: http.StatusBadRequest, Err: err}
	for _, u := range unmarshalErrors(err) {
		is := Issue{Severity: "error", Code: "value", Details: u.details}
		if u.diagnostics != "" {
			is.Diagnostics = u.details + ": " + u.diagnostics
		}
		expr := fhirPath(u.path)
		switch {
		case u.typ == "RequiredFieldError" || strings.HasPrefix(u.details, "missing required"):
			is.Code = "required"
		case u.details == "unknown field":
			is.Code = "structure"
			if k, err := strconv.Unquote(u.diagnostics); err == nil && k != "" && expr != "" {
				expr += "." + k
			}
		case strings.Contains(u.details, "reference"):
			is.Code = "invalid"
		}
		if expr != "" {
			is.Expression = []string{expr}
		}
		if e.path == "" {
			e.path = fhirPath(u.path)
		}
		e.Issues = append(e.Issues, is)
	}
	if len(e.Issues) == 0 {
		e.Issues = []Issue{{Severity: "error", Code: "invalid", Details: "the resource is not valid FHIR R4"}}
	}
	return e
}

type unmarshalError struct {
	path, details, diagnostics, typ string
}

// unmarshalErrors extracts jsonformat's UnmarshalError values (a pointer
// to a struct with Path, Details, Diagnostics and Type, or a list of them)
// from err.
func unmarshalErrors(err error) []unmarshalError {
	var out []unmarshalError
	field := func(v reflect.Value, name string) string {
		f := v.FieldByName(name)
		if !f.IsValid() {
			return ""
		}
		if f.Kind() == reflect.String {
			return f.String()
		}
		return ""
	}
	one := func(v reflect.Value) bool {
		if v.Kind() == reflect.Pointer {
			if v.IsNil() {
				return false
			}
			v = v.Elem()
		}
		if v.Kind() != reflect.Struct || !v.FieldByName("Details").IsValid() {
			return false
		}
		out = append(out, unmarshalError{
			path: field(v, "Path"), details: field(v, "Details"),
			diagnostics: field(v, "Diagnostics"), typ: field(v, "Type"),
		})
		return true
	}
	for e := err; e != nil; e = errors.Unwrap(e) {
		v := reflect.ValueOf(e)
		if v.Kind() == reflect.Slice {
			for i := 0; i < v.Len(); i++ {
				one(v.Index(i))
			}
			if len(out) > 0 {
				return out
			}
			continue
		}
		if one(v) {
			return out
		}
	}
	return out
}

// Marshal writes a resource as FHIR JSON.
func (c *Codec) Marshal(cr *bcrpb.ContainedResource) ([]byte, error) {
	b, err := c.m.Marshal(cr)
	if err != nil {
		return nil, fmt.Errorf("fhir: marshal: %w", err)
	}
	return b, nil
}
