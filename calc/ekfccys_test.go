package calc_test

import (
	"testing"

	"github.com/stretchr/testify/require"

	"filtrate/calc"
)

func TestEKFCCysMetadata(t *testing.T) {
	e := registered(t, "ekfc-cys")
	require.Equal(t, "1", e.Version)
	require.Empty(t, e.LOINC)        // no equation-specific LOINC code; policy uses generic 69405-9 (common practice)
	require.Equal(t, 18.0, e.MinAge) // Pottel 2023: Q estimated and validated in adults
	require.Zero(t, e.MaxAge)
	require.Equal(t, calc.NeedCystatinC, e.Needs) // Pottel 2023: no sex, no race
	require.Equal(t, []calc.Analyte{calc.CystatinC}, e.Uses())
}

func TestEKFCCysChecks(t *testing.T) {
	e := registered(t, "ekfc-cys")
	tests := []struct {
		name   string
		in     calc.Inputs
		want   float64
		places int // decimals the source prints; compared after rounding when ≥ 0
		source string
	}{
		{
			name: "60 y 0.8 mg/L",
			in:   calc.Inputs{AgeYears: 60, CystatinCMgL: 0.8},
			// Q = 0.83 + 0.005 × 10 = 0.88; 0.8/0.88 = 0.909091; ^-0.322 × 107.3 × 0.990^20 = 90.496557
			want: 90.50, places: 2,
			source: "kidney.epi R package 1.3.0, egfr.ekfc.cys documented example (90.5)",
		},
		{
			name: "30 y 0.7 mg/L",
			in:   calc.Inputs{AgeYears: 30, CystatinCMgL: 0.7},
			// Q = 0.83; 0.843373^-0.322 × 107.3
			want: 113.349941, places: -1,
			source: "hand computation from the published formula (Pottel 2023)",
		},
		{
			name: "45 y 1.5 mg/L",
			in:   calc.Inputs{AgeYears: 45, CystatinCMgL: 1.5},
			// Q = 0.83; 1.807229^-1.132 × 107.3 × 0.990^5
			want: 52.219991, places: -1,
			source: "hand computation from the published formula (Pottel 2023)",
		},
		{
			name: "50 y 0.83 mg/L (Scys = Q)",
			in:   calc.Inputs{AgeYears: 50, CystatinCMgL: 0.83},
			// Q = 0.83; ratio 1; 107.3 × 0.990^10
			want: 97.040197, places: -1,
			source: "hand computation from the published formula (Pottel 2023)",
		},
		{
			name: "70 y 1.2 mg/L",
			in:   calc.Inputs{AgeYears: 70, CystatinCMgL: 1.2},
			// Q = 0.83 + 0.1 = 0.93; 1.290323^-1.132 × 107.3 × 0.990^30
			want: 59.476457, places: -1,
			source: "hand computation from the published formula (Pottel 2023)",
		},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			for _, sex := range []calc.Sex{calc.SexUnknown, calc.SexFemale, calc.SexMale} {
				in := tt.in
				in.Sex = sex // Pottel 2023: the equation does not use sex
				v, steps := pedsCompute(t, e, in)
				if tt.places >= 0 {
					require.Equal(t, tt.want, pedsRound(v, tt.places), "%s", tt.source)
				} else {
					require.InDelta(t, tt.want, v, 5e-6, "%s", tt.source)
				}
				require.Equal(t, v, steps[len(steps)-1].Value, "last step is the result")
			}
		})
	}
}

func BenchmarkEKFCCys(b *testing.B) {
	e := registered(b, "ekfc-cys")
	in := calc.Inputs{AgeYears: 70, CystatinCMgL: 1.2}
	for b.Loop() {
		if _, _, err := e.Compute(in); err != nil {
			b.Fatal(err)
		}
	}
}
