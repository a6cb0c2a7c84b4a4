package calc_test

import (
	"testing"

	"github.com/stretchr/testify/require"

	"filtrate/calc"
)

func TestEKFCCrCysMetadata(t *testing.T) {
	e := registered(t, "ekfc-crcys")
	require.Equal(t, "1", e.Version)
	require.Empty(t, e.LOINC)        // no equation-specific LOINC code; policy uses generic 69405-9 (common practice)
	require.Equal(t, 18.0, e.MinAge) // the cystatin C part is validated from 18 (Pottel 2023)
	require.Zero(t, e.MaxAge)
	require.Equal(t, calc.NeedCreatinine|calc.NeedCystatinC|calc.NeedSex, e.Needs)
	require.Equal(t, []calc.Analyte{calc.Creatinine, calc.CystatinC}, e.Uses())
}

func TestEKFCCrCysChecks(t *testing.T) {
	e := registered(t, "ekfc-crcys")
	tests := []struct {
		name    string
		in      calc.Inputs
		cr, cys float64
		want    float64
		source  string
	}{
		{
			name: "man 60 y creatinine 1.4 mg/dL cystatin C 0.8 mg/L",
			in:   calc.Inputs{AgeYears: 60, Sex: calc.SexMale, CreatinineMgDL: 1.4, CystatinCMgL: 0.8},
			cr:   53.555068, cys: 90.496557,
			// (53.555068 + 90.496557) / 2
			want:   72.025813,
			source: "arithmetic mean (Pottel 2023) of the two kidney.epi 1.3.0 documented examples (53.56, 90.5)",
		},
		{
			name: "woman 75 y creatinine 2.0 mg/dL cystatin C 1.2 mg/L",
			in:   calc.Inputs{AgeYears: 75, Sex: calc.SexFemale, CreatinineMgDL: 2.0, CystatinCMgL: 1.2},
			// cr: Q 62, 2.851613^-1.132 × 107.3 × 0.990^35 = 23.049898
			// cys: Q 0.955, 1.256545^-1.132 × 107.3 × 0.990^35 = 58.285722
			cr: 23.049898, cys: 58.285722,
			want:   40.667810,
			source: "hand computation from the published formulas (Pottel 2021, 2023)",
		},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			v, steps := pedsCompute(t, e, tt.in)
			require.InDelta(t, tt.want, v, 5e-6, "%s", tt.source)
			require.InDelta(t, tt.cr, pedsStep(t, steps, "eGFRcr"), 5e-6)
			require.InDelta(t, tt.cys, pedsStep(t, steps, "eGFRcys"), 5e-6)
			// Both components' own steps are kept, prefixed.
			require.InDelta(t, tt.cr, pedsStep(t, steps, "cr: eGFR"), 5e-6)
			require.InDelta(t, tt.cys, pedsStep(t, steps, "cys: eGFR"), 5e-6)
			pedsStep(t, steps, "cr: Q (µmol/L)")
			pedsStep(t, steps, "cys: Q (mg/L)")
			require.Equal(t, "eGFR", steps[len(steps)-1].Name)
			require.Equal(t, v, steps[len(steps)-1].Value, "last step is the result")

			// The mean equals the mean of the registered component equations.
			cr, _ := pedsCompute(t, registered(t, "ekfc-cr"), tt.in)
			cys, _ := pedsCompute(t, registered(t, "ekfc-cys"), tt.in)
			require.Equal(t, (cr+cys)/2, v)
		})
	}
}

func BenchmarkEKFCCrCys(b *testing.B) {
	e := registered(b, "ekfc-crcys")
	in := calc.Inputs{AgeYears: 60, Sex: calc.SexMale, CreatinineMgDL: 1.4, CystatinCMgL: 0.8}
	for b.Loop() {
		if _, _, err := e.Compute(in); err != nil {
			b.Fatal(err)
		}
	}
}
