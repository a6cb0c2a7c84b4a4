package calc_test

import (
	"testing"

	"github.com/stretchr/testify/require"

	"filtrate/calc"
)

func TestCKiDU25CysMetadata(t *testing.T) {
	e := registered(t, "ckid-u25-cys")
	require.Equal(t, "1", e.Version)
	require.Empty(t, e.LOINC)                                  // no equation-specific LOINC code; policy uses generic 69405-9 (common practice)
	require.Equal(t, 1.0, e.MinAge)                            // Pierce 2021: ages 1-25
	require.Equal(t, 25.0, e.MaxAge)                           // "U25": under 25
	require.Equal(t, calc.NeedCystatinC|calc.NeedSex, e.Needs) // K depends on sex; no height
	require.Equal(t, []calc.Analyte{calc.CystatinC}, e.Uses())
}

func TestCKiDU25CysChecks(t *testing.T) {
	e := registered(t, "ckid-u25-cys")
	tests := []struct {
		name string
		in   calc.Inputs
		want float64 // printed to one decimal
	}{
		{"boy 11 y CysC 1.3", calc.Inputs{AgeYears: 11, Sex: calc.SexMale, CystatinCMgL: 1.3}, 64.2},
		{"girl 11 y CysC 1.3", calc.Inputs{AgeYears: 11, Sex: calc.SexFemale, CystatinCMgL: 1.3}, 61.2},
		{"boy 15 y CysC 1.6", calc.Inputs{AgeYears: 15, Sex: calc.SexMale, CystatinCMgL: 1.6}, 54.5},
		{"girl 15 y CysC 1.6", calc.Inputs{AgeYears: 15, Sex: calc.SexFemale, CystatinCMgL: 1.6}, 46.1},
		{"man 20 y CysC 1.8", calc.Inputs{AgeYears: 20, Sex: calc.SexMale, CystatinCMgL: 1.8}, 42.8},
		{"woman 20 y CysC 1.8", calc.Inputs{AgeYears: 20, Sex: calc.SexFemale, CystatinCMgL: 1.8}, 37.9},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			v, steps := pedsCompute(t, e, tt.in)
			require.Equal(t, tt.want, pedsRound(v, 1), ckidU25RefSource)
			require.Equal(t, v, steps[len(steps)-1].Value, "last step is the result")
			// Height plays no part in the cystatin C equation (Pierce 2021).
			in := tt.in
			in.HeightCM = 150
			v2, _ := pedsCompute(t, e, in)
			require.Equal(t, v, v2)
		})
	}
}

func BenchmarkCKiDU25Cys(b *testing.B) {
	e := registered(b, "ckid-u25-cys")
	in := calc.Inputs{AgeYears: 15, Sex: calc.SexFemale, CystatinCMgL: 1.6}
	for b.Loop() {
		if _, _, err := e.Compute(in); err != nil {
			b.Fatal(err)
		}
	}
}
