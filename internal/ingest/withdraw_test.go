package ingest_test

import (
	"context"
	"fmt"
	"strings"
	"testing"

	"github.com/stretchr/testify/require"

	"filtrate/fhir"
)

// withHistory lets withdrawals consult the result history, as the daemon
// does.
func withHistory(e *env) {
	e.hl7.History = e.st
	e.h.History = e.st
}

// Cases from a review of correction sequences (HL7 v2; the receiver keys
// on OBR + OBX-3 + OBX-4). Values are invented; tests check identity and
// status.
func TestCorrectionSequences(t *testing.T) {
	ctx := context.Background()
	f := func(format, status string) string { return fmt.Sprintf(format, status) }

	t.Run("cystatin C corrected alone withdraws the combined eGFR made with it", func(t *testing.T) {
		e := newEnv(t, withHistory)
		p := e.hl7.Handle(ctx, oruWith("P1", "F", f(obxCreatinine, "F"), f(obxCystatinC, "F")))
		require.Equal(t, "AA", p.Code, p.Err)
		require.Len(t, egfrRows(t, p.Enriched), 3)

		corrected := `OBX|1|NM|33863-2^Cystatin C^LN||2.0|mg/L|||||C|||20240603080000`
		p = e.hl7.Handle(ctx, oruWith("P2", "F", corrected))
		require.Equal(t, "AA", p.Code, p.Err)
		rows := egfrRows(t, p.Enriched)
		require.Equal(t, "ckd-epi-2012-cys", rows[0].SubID)
		require.Equal(t, "C", rows[0].Status, "the cystatin C eGFR is corrected")
		require.Equal(t, []egfrRow{{Code: "98980-6", SubID: "ckd-epi-2021-crcys", Status: "D", Equation: "ckd-epi-2021-crcys"}},
			withdrawn(rows), "the combined value made with the old cystatin C must not stand")
	})

	t.Run("a creatinine-only report withdraws no combined eGFR that was never made", func(t *testing.T) {
		e := newEnv(t, withHistory)
		p := e.hl7.Handle(ctx, oruWith("Q1", "F", f(obxCreatinine, "F")))
		require.Equal(t, "AA", p.Code, p.Err)
		p = e.hl7.Handle(ctx, oruWith("Q2", "F", `OBX|1|NM|2160-0^Creatinine^LN||haemolysed|mg/dL|||||C|||20240603080000`))
		require.Equal(t, "AA", p.Code, p.Err)
		require.Equal(t, []egfrRow{{Code: loincCr2021, SubID: "ckd-epi-2021-cr", Status: "D", Equation: "ckd-epi-2021-cr"}},
			withdrawn(egfrRows(t, p.Enriched)))
	})

	child := func(control string, obx ...string) []byte {
		return []byte(fmt.Sprintf("MSH|^~\\&|NVLAB|NVL|EHR|NVH|20240603093000||ORU^R01^ORU_R01|%s|P|2.5.1\r"+
			"PID|1||NVL-900002^^^NVL^MR||Whitlock^Ivy||20150310|M\r"+
			"OBR|1|ORD9002|NVL9002|RENAL^Renal^L|||20240603080000\r", control) + joinCR(obx))
	}
	height := `OBX|1|NM|8302-2^Body height^LN||%s|cm|||||%s|||20240603080000`
	crChild := `OBX|2|NM|2160-0^Creatinine^LN||0.6|mg/dL|||||F|||20240603080000`

	t.Run("a corrected height gives a corrected eGFR", func(t *testing.T) {
		e := newEnv(t, withHistory)
		p := e.hl7.Handle(ctx, child("H1", fmt.Sprintf(height, "140", "F"), crChild))
		require.Equal(t, "AA", p.Code, p.Err)
		rows := egfrRows(t, p.Enriched)
		require.Len(t, rows, 1)
		require.Equal(t, "F", rows[0].Status)
		p = e.hl7.Handle(ctx, child("H2", fmt.Sprintf(height, "150", "C"), crChild))
		require.Equal(t, "AA", p.Code, p.Err)
		rows = egfrRows(t, p.Enriched)
		require.Len(t, rows, 1)
		require.Equal(t, "ckid-u25-cr", rows[0].SubID)
		require.Equal(t, "C", rows[0].Status, "a receiver that lets only C replace F must take it")
	})

	t.Run("a deleted height withdraws the eGFR made with it", func(t *testing.T) {
		e := newEnv(t, withHistory)
		p := e.hl7.Handle(ctx, child("D1", fmt.Sprintf(height, "140", "F"), crChild))
		require.Equal(t, "AA", p.Code, p.Err)
		p = e.hl7.Handle(ctx, child("D2", fmt.Sprintf(height, "140", "D"), crChild))
		require.Equal(t, "AA", p.Code, p.Err)
		require.Equal(t, []egfrRow{{Code: loincGeneric, SubID: "ckid-u25-cr", Status: "D", Equation: "ckid-u25-cr"}},
			withdrawn(egfrRows(t, p.Enriched)))
	})
}

func joinCR(lines []string) string {
	out := ""
	for _, l := range lines {
		out += l + "\r"
	}
	return out
}

// Each withdrawal leaves an audit record naming the equation, so an auditor
// can find it with "audit search --equation".
func TestWithdrawalsAreAudited(t *testing.T) {
	ctx := context.Background()
	e := newEnv(t, withHistory)
	p := e.hl7.Handle(ctx, oruWith("A1", "F", fmt.Sprintf(obxCreatinine, "F")))
	require.Equal(t, "AA", p.Code, p.Err)
	p = e.hl7.Handle(ctx, oruWith("A2", "F", fmt.Sprintf(obxCreatinine, "D")))
	require.Equal(t, "AA", p.Code, p.Err)
	var found bool
	for _, r := range e.records(t) {
		if r.MessageID == "A2" && r.SuppressionCode == "egfr-withdrawn" {
			found = true
			require.Equal(t, "ckd-epi-2021-cr", r.Equation)
			require.Contains(t, r.SuppressionText, "withdrawn (status D)")
		}
	}
	require.True(t, found, "an egfr-withdrawn record for the withdrawn eGFR")
}

// withRecord gives the handlers the record of what was sent, as the daemon
// does.
func withRecord(e *env) {
	withHistory(e)
	e.hl7.Sent = e.st
	e.h.Sent = e.st
}

// With the record of what was sent, withdrawals address exactly what is
// on the receiver's side (sequences from a review of real correction
// flows).
func TestWithdrawalsFromTheRecordOfWhatWasSent(t *testing.T) {
	ctx := context.Background()
	f := func(format, status string) string { return fmt.Sprintf(format, status) }

	t.Run("a preliminary eGFR whose input arrives final but uncomputable is withdrawn", func(t *testing.T) {
		e := newEnv(t, withRecord)
		p := e.hl7.Handle(ctx, oruWith("R1", "F", f(obxCreatinine, "P")))
		require.Equal(t, "AA", p.Code, p.Err)
		require.Equal(t, "P", egfrRows(t, p.Enriched)[0].Status)
		p = e.hl7.Handle(ctx, oruWith("R2", "F", `OBX|1|NM|2160-0^Creatinine^LN||haemolysed|mg/dL|||||F|||20240603080000`))
		require.Equal(t, "AA", p.Code, p.Err)
		require.Equal(t, []egfrRow{{Code: loincCr2021, SubID: "ckd-epi-2021-cr", Status: "D", Equation: "ckd-epi-2021-cr"}},
			withdrawn(egfrRows(t, p.Enriched)))
	})

	t.Run("only what was sent is withdrawn", func(t *testing.T) {
		e := newEnv(t, withRecord)
		p := e.hl7.Handle(ctx, oruWith("N1", "F", f(obxCreatinine, "F")))
		require.Equal(t, "AA", p.Code, p.Err)
		p = e.hl7.Handle(ctx, oruWith("N2", "F", f(obxCreatinine, "W")))
		require.Equal(t, "AA", p.Code, p.Err)
		require.Equal(t, []egfrRow{{Code: loincCr2021, SubID: "ckd-epi-2021-cr", Status: "W", Equation: "ckd-epi-2021-cr"}},
			withdrawn(egfrRows(t, p.Enriched)), "no combined eGFR, never sent, is named")
		// Withdrawn once: a repeat of the deletion names nothing more.
		p = e.hl7.Handle(ctx, oruWith("N3", "F", f(obxCreatinine, "D")))
		require.Equal(t, "AA", p.Code, p.Err)
		require.Empty(t, withdrawn(egfrRows(t, p.Enriched)))
	})

	t.Run("a corrected birth date that changes the age band withdraws the old band's eGFR", func(t *testing.T) {
		e := newEnv(t, withRecord)
		child := func(control, dob string, obx ...string) []byte {
			return []byte(fmt.Sprintf("MSH|^~\\&|NVLAB|NVL|EHR|NVH|20240603093000||ORU^R01^ORU_R01|%s|P|2.5.1\r"+
				"PID|1||NVL-900003^^^NVL^MR||Whitlock^Rue||%s|M\r"+
				"OBR|1|ORD9003|NVL9003|RENAL^Renal^L|||20240603080000\r", control, dob) + joinCR(obx))
		}
		height := `OBX|1|NM|8302-2^Body height^LN||170|cm|||||F|||20240603080000`
		cr := `OBX|2|NM|2160-0^Creatinine^LN||0.8|mg/dL|||||C|||20240603080000`
		p := e.hl7.Handle(ctx, child("B1", "20100310", height, strings.Replace(cr, "|C|", "|F|", 1)))
		require.Equal(t, "AA", p.Code, p.Err)
		require.Equal(t, "ckid-u25-cr", egfrRows(t, p.Enriched)[0].SubID)
		p = e.hl7.Handle(ctx, child("B2", "19800310", height, cr)) // the birth date was wrong: an adult
		require.Equal(t, "AA", p.Code, p.Err)
		rows := egfrRows(t, p.Enriched)
		require.Equal(t, []egfrRow{{Code: loincGeneric, SubID: "ckid-u25-cr", Status: "D", Equation: "ckid-u25-cr"}}, withdrawn(rows))
		require.Contains(t, []string{rows[0].SubID, rows[1].SubID}, "ckd-epi-2021-cr")
	})

	t.Run("sex now known: the values as if female and as if male are withdrawn", func(t *testing.T) {
		e := newEnv(t, withRecord, withPolicy("nkf-asn-2021", "both"))
		p := e.hl7.Handle(ctx, oruWith("X1", "U", f(obxCreatinine, "F")))
		require.Equal(t, "AA", p.Code, p.Err)
		require.Len(t, egfrRows(t, p.Enriched), 2)
		p = e.hl7.Handle(ctx, oruWith("X2", "F", f(obxCreatinine, "C")))
		require.Equal(t, "AA", p.Code, p.Err)
		rows := egfrRows(t, p.Enriched)
		require.Equal(t, []egfrRow{
			{Code: loincCr2021, SubID: "ckd-epi-2021-cr.F", Status: "D", Equation: "ckd-epi-2021-cr"},
			{Code: loincCr2021, SubID: "ckd-epi-2021-cr.M", Status: "D", Equation: "ckd-epi-2021-cr"},
		}, withdrawn(rows))
		require.Equal(t, "ckd-epi-2021-cr", rows[0].SubID, "the corrected value, as female")
		require.Equal(t, "C", rows[0].Status)
	})
}

// FHIR: a cystatin C corrected alone withdraws the combined eGFR at the
// exact id it was written to (from the record of what was sent).
func TestFHIRPartialCorrectionFromTheRecord(t *testing.T) {
	ctx := context.Background()
	e := newEnv(t, withRecord)
	at := "2024-06-03T08:00:00Z"
	crObs := fhirObs{id: "o-cr", code: "2160-0", status: "final", value: "1.0", unit: "mg/dL"}
	cysObs := fhirObs{id: "o-cys", code: "33863-2", status: "final", value: "1.0", unit: "mg/L"}
	p := e.h.Handle(ctx, fhir.EndpointBundle, fhirBundle("F1", "female", "1970-03-10", at, crObs, cysObs))
	require.Equal(t, 200, p.Status, string(p.Body))
	first := byEquation(egfrObservations(t, p.Body))
	combined := ""
	for k, o := range first {
		if strings.HasPrefix(k, "ckd-epi-2021-crcys|") {
			combined = o.ID
		}
	}
	require.NotEmpty(t, combined)

	cysObs.status, cysObs.value = "corrected", "2.0"
	p = e.h.Handle(ctx, fhir.EndpointBundle, fhirBundle("F2", "female", "1970-03-10", at, cysObs))
	require.Equal(t, 200, p.Status, string(p.Body))
	var withdrawnIDs []string
	for _, o := range egfrObservations(t, p.Body) {
		if !o.HasValue {
			withdrawnIDs = append(withdrawnIDs, o.ID)
			require.Equal(t, "entered-in-error", o.Status)
		}
	}
	require.Equal(t, []string{combined}, withdrawnIDs)
}

// Findings of a third review of the record of what was sent.
func TestRecordReviewCases(t *testing.T) {
	ctx := context.Background()
	f := func(format, status string) string { return fmt.Sprintf(format, status) }

	t.Run("an incomplete record does not hide an eGFR the rules know", func(t *testing.T) {
		e := newEnv(t, withRecord)
		// Creatinine eGFR sent under one sending facility; the cystatin C
		// of the same order then comes from another, whose record holds
		// only what it sent.
		p := e.hl7.Handle(ctx, oruWith("I1", "F", f(obxCreatinine, "F"), f(obxCystatinC, "F")))
		require.Equal(t, "AA", p.Code, p.Err)
		other := func(control string, obx ...string) []byte {
			return []byte(strings.Replace(string(oruWith(control, "F", obx...)), "|NVLAB|NVL|", "|NVLAB|NVL-SAT|", 1))
		}
		p = e.hl7.Handle(ctx, other("I2", f(obxCystatinC, "F")))
		require.Equal(t, "AA", p.Code, p.Err)
		p = e.hl7.Handle(ctx, other("I3", f(obxCreatinine, "D")))
		require.Equal(t, "AA", p.Code, p.Err)
		got := map[string]string{}
		for _, r := range withdrawn(egfrRows(t, p.Enriched)) {
			got[r.SubID] = r.Status
		}
		require.Equal(t, map[string]string{"ckd-epi-2021-cr": "D", "ckd-epi-2021-crcys": "D"}, got)
	})

	t.Run("a resend lacking height or birth date withdraws no valid eGFR", func(t *testing.T) {
		e := newEnv(t, withRecord)
		child := func(control string, obx ...string) []byte {
			return []byte(fmt.Sprintf("MSH|^~\\&|NVLAB|NVL|EHR|NVH|20240603093000||ORU^R01^ORU_R01|%s|P|2.5.1\r"+
				"PID|1||NVL-900004^^^NVL^MR||Whitlock^Ash||20150310|F\r"+
				"OBR|1|ORD9004|NVL9004|RENAL^Renal^L|||20240603080000\r", control) + joinCR(obx))
		}
		height := `OBX|1|NM|8302-2^Body height^LN||140|cm|||||F|||20240603080000`
		crChild := `OBX|2|NM|2160-0^Creatinine^LN||0.6|mg/dL|||||F|||20240603080000`
		p := e.hl7.Handle(ctx, child("V1", height, crChild))
		require.Equal(t, "AA", p.Code, p.Err)
		require.Len(t, egfrRows(t, p.Enriched), 1)
		p = e.hl7.Handle(ctx, child("V2", crChild))
		require.Equal(t, "AA", p.Code, p.Err)
		require.Empty(t, egfrRows(t, p.Enriched), "no eGFR, and no withdrawal of the valid one")

		p = e.hl7.Handle(ctx, oruWith("V3", "F", f(obxCreatinine, "F")))
		require.Equal(t, "AA", p.Code, p.Err)
		noDOB := strings.Replace(string(oruWith("V4", "F", f(obxCreatinine, "F"))), "|19700310|", "||", 1)
		p = e.hl7.Handle(ctx, []byte(noDOB))
		require.Equal(t, "AA", p.Code, p.Err)
		require.Empty(t, withdrawn(egfrRows(t, p.Enriched)))
	})

	t.Run("FHIR: another specimen at the same time is not withdrawn", func(t *testing.T) {
		e := newEnv(t, withRecord)
		day := "2024-06-03"
		p := e.h.Handle(ctx, fhir.EndpointBundle, fhirBundle("S1", "female", "1970-03-10", day,
			fhirObs{id: "morning", code: "2160-0", status: "final", value: "1.0", unit: "mg/dL"}))
		require.Equal(t, 200, p.Status, string(p.Body))
		p = e.h.Handle(ctx, fhir.EndpointBundle, fhirBundle("S2", "female", "1970-03-10", day,
			fhirObs{id: "evening", code: "2160-0", status: "final", value: `"haemolysed"`}))
		require.Equal(t, 200, p.Status, string(p.Body))
		for _, o := range egfrObservations(t, p.Body) {
			require.True(t, o.HasValue, "nothing of the morning specimen is withdrawn: %+v", o)
		}
	})

	t.Run("two OBR segments sharing a filler number keep their own records", func(t *testing.T) {
		e := newEnv(t, withRecord, withPolicy("ekfc", ""))
		msg := func(control string) []byte {
			return []byte(strings.Join([]string{
				`MSH|^~\&|NVLAB|NVL|EHR|NVH|20240603093000||ORU^R01^ORU_R01|` + control + `|P|2.5.1`,
				`PID|1||NVL-900001^^^NVL^MR||Whitlock^Pell||19700310|F`,
				`OBR|1|ORD9001|NVL9001|RENAL^Renal^L|||20240603080000`,
				f(obxCreatinine, "F"), f(obxCystatinC, "F"),
				`OBR|2|ORD9001|NVL9001|RENAL^Renal^L|||20240603080000`,
				f(obxCreatinine, "F"),
			}, "\r") + "\r")
		}
		p := e.hl7.Handle(ctx, msg("T1"))
		require.Equal(t, "AA", p.Code, p.Err)
		p = e.hl7.Handle(ctx, msg("T2"))
		require.Equal(t, "AA", p.Code, p.Err)
		require.Empty(t, withdrawn(egfrRows(t, p.Enriched)), "the second OBR does not withdraw the first one's combined eGFR")
	})
}
