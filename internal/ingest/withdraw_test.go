package ingest_test

import (
	"context"
	"fmt"
	"testing"

	"github.com/stretchr/testify/require"
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
