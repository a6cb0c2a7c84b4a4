package fhir

import (
	"fmt"
	"sort"
	"strings"
	"time"

	cpb "github.com/google/fhir/go/proto/google/fhir/proto/r4/core/codes_go_proto"
	bcrpb "github.com/google/fhir/go/proto/google/fhir/proto/r4/core/resources/bundle_and_contained_resource_go_proto"
	cspb "github.com/google/fhir/go/proto/google/fhir/proto/r4/core/resources/capability_statement_go_proto"
	vpb "github.com/google/fhir/go/proto/google/fhir/proto/r4/core/valuesets_go_proto"

	"filtrate/calc"
	"filtrate/hl7v2"
)

// Capabilities describe what a filtrate instance accepts, for
// CapabilityStatement.
type Capabilities struct {
	// Version is filtrate's version; Site the laboratory's name.
	Version string
	Site    string
	// Date is the statement's date (when the configuration was loaded).
	Date time.Time
	// Codes are the recognised input codes (hl7v2.DefaultCodeEntries and
	// the configured local codes). System "LN" is LOINC.
	Codes []hl7v2.CodeEntry
	// Outputs are the eGFR observations the policy can report.
	Outputs []calc.Result
}

// CapabilityStatement writes the CapabilityStatement answered to GET
// [base]/metadata: an instance statement for FHIR 4.0.1 in
// application/fhir+json, with Observation create, Bundle transaction and
// batch, and the recognised codes in the Observation documentation.
func (c *Codec) CapabilityStatement(cp Capabilities) ([]byte, error) {
	desc := "filtrate: eGFR calculation for laboratory results"
	if cp.Site != "" {
		desc += " at " + cp.Site
	}
	cs := &cspb.CapabilityStatement{
		Name:        str("filtrate"),
		Title:       str("filtrate eGFR service"),
		Status:      &cspb.CapabilityStatement_StatusCode{Value: cpb.PublicationStatusCode_ACTIVE},
		Date:        dateTime(cp.Date),
		Kind:        &cspb.CapabilityStatement_KindCode{Value: cpb.CapabilityStatementKindCode_INSTANCE},
		Software:    &cspb.CapabilityStatement_Software{Name: str("filtrate"), Version: str(cp.Version)},
		Description: markdown(desc + "."),
		Implementation: &cspb.CapabilityStatement_Implementation{
			Description: str(desc),
		},
		FhirVersion: &cspb.CapabilityStatement_FhirVersionCode{Value: cpb.FHIRVersionCode_V_4_0_1},
		Format: []*cspb.CapabilityStatement_FormatCode{
			{Value: MediaType}, {Value: "application/json"},
		},
		Rest: []*cspb.CapabilityStatement_Rest{{
			Mode: &cspb.CapabilityStatement_Rest_ModeCode{Value: cpb.RestfulCapabilityModeCode_SERVER},
			Documentation: markdown("POST a Bundle (transaction, batch or collection) holding Patients and Observations to [base], " +
				"or one Observation (with a contained Patient, or a Patient the patient source knows) to [base]/Observation. " +
				"The answer is a Bundle with the calculated eGFR Observations, a Provenance for each, and an OperationOutcome " +
				"saying why any eGFR was not calculated. " + patientIdentifierDoc),
			Resource: []*cspb.CapabilityStatement_Rest_Resource{{
				Type:          &cspb.CapabilityStatement_Rest_Resource_TypeCode{Value: cpb.ResourceTypeCode_OBSERVATION},
				Documentation: markdown(codesDoc(cp)),
				Interaction: []*cspb.CapabilityStatement_Rest_Resource_ResourceInteraction{{
					Code: &cspb.CapabilityStatement_Rest_Resource_ResourceInteraction_CodeType{Value: vpb.TypeRestfulInteractionValueSet_CREATE},
				}},
			}},
			Interaction: []*cspb.CapabilityStatement_Rest_SystemInteraction{
				{Code: &cspb.CapabilityStatement_Rest_SystemInteraction_CodeType{Value: vpb.SystemRestfulInteractionValueSet_TRANSACTION}},
				{Code: &cspb.CapabilityStatement_Rest_SystemInteraction_CodeType{Value: vpb.SystemRestfulInteractionValueSet_BATCH}},
			},
		}},
	}
	return c.Marshal(&bcrpb.ContainedResource{OneofResource: &bcrpb.ContainedResource_CapabilityStatement{CapabilityStatement: cs}})
}

// patientIdentifierDoc states the patient identity requirement (see
// Extract).
const patientIdentifierDoc = "Patient.identifier with both system and value is required for every Patient an input Observation " +
	"refers to (contained, in the Bundle, or from the patient source): a request whose patient lacks one is refused with " +
	"HTTP 422 Unprocessable Entity and an OperationOutcome naming Patient.identifier, and nothing is recorded or forwarded."

// codesDoc lists the recognised codes and the codes reported.
func codesDoc(cp Capabilities) string {
	var loinc, local []string
	for _, e := range cp.Codes {
		switch e.System {
		case "LN":
			loinc = append(loinc, fmt.Sprintf("%s (%s)", e.Code, e.Analyte))
		case "":
			local = append(local, fmt.Sprintf("%s in any system (%s)", e.Code, e.Analyte))
		default:
			local = append(local, fmt.Sprintf("%s in %s (%s)", e.Code, e.System, e.Analyte))
		}
	}
	sort.Strings(loinc)
	sort.Strings(local)
	var b strings.Builder
	b.WriteString("Accepted inputs, recognised by Observation.code: LOINC (" + SystemLOINC + ") ")
	b.WriteString(strings.Join(loinc, ", "))
	if len(local) > 0 {
		b.WriteString("; local codes ")
		b.WriteString(strings.Join(local, ", "))
	}
	b.WriteString(". Values as valueQuantity with a UCUM code; a comparator makes the value censored (no eGFR). " +
		"Collection time from effectiveDateTime or effectivePeriod.start; Patient.identifier (system and value, required), " +
		"Patient.birthDate (full date) and gender.")
	var out []string
	seen := map[string]bool{}
	for _, r := range cp.Outputs {
		if r.LOINC == "" || seen[r.LOINC+r.Equation] {
			continue
		}
		seen[r.LOINC+r.Equation] = true
		out = append(out, fmt.Sprintf("%s (%s)", r.LOINC, r.EquationName))
	}
	if len(out) > 0 {
		b.WriteString(" Reported: LOINC " + strings.Join(out, ", ") + ".")
	}
	return b.String()
}
