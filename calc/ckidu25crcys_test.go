package calc_test

import (
	"testing"

	"github.com/stretchr/testify/require"

	"filtrate/calc"
)

func TestCKiDU25CrCysMetadata(t *testing.T) {
	e := registered(t, "ckid-u25-crcys")
	require.Equal(t, "1", e.Version)
	require.Empty(t, e.LOINC) // no equation-specific LOINC code; policy uses generic 69405-9 (common practice)
	require.Equal(t, 1.0, e.MinAge)
	require.Equal(t, 25.0, e.MaxAge)
	require.Equal(t, calc.NeedCreatinine|calc.NeedCystatinC|calc.NeedHeight|calc.NeedSex, e.Needs)
	require.Equal(t, []calc.Analyte{calc.Creatinine, calc.CystatinC}, e.Uses())
}

func TestCKiDU25CrCysChecks(t *testing.T) {
	e := registered(t, "ckid-u25-crcys")
	tests := []struct {
		name string
		in   calc.Inputs
		want float64 // eGFRU25ave, printed to one decimal
	}{
		{"boy 11 y 1.20 m Scr 0.9 CysC 1.3", calc.Inputs{AgeYears: 11, Sex: calc.SexMale, HeightCM: 120, CreatinineMgDL: 0.9, CystatinCMgL: 1.3}, 57.9},
		{"girl 11 y 1.20 m Scr 0.9 CysC 1.3", calc.Inputs{AgeYears: 11, Sex: calc.SexFemale, HeightCM: 120, CreatinineMgDL: 0.9, CystatinCMgL: 1.3}, 54.5},
		{"boy 15 y 1.60 m Scr 1.9 CysC 1.6", calc.Inputs{AgeYears: 15, Sex: calc.SexMale, HeightCM: 160, CreatinineMgDL: 1.9, CystatinCMgL: 1.6}, 46.0},
		{"girl 15 y 1.60 m Scr 1.9 CysC 1.6", calc.Inputs{AgeYears: 15, Sex: calc.SexFemale, HeightCM: 160, CreatinineMgDL: 1.9, CystatinCMgL: 1.6}, 39.3},
		{"man 20 y 1.81 m Scr 2.1 CysC 1.8", calc.Inputs{AgeYears: 20, Sex: calc.SexMale, HeightCM: 181, CreatinineMgDL: 2.1, CystatinCMgL: 1.8}, 43.3},
		{"woman 20 y 1.81 m Scr 2.1 CysC 1.8", calc.Inputs{AgeYears: 20, Sex: calc.SexFemale, HeightCM: 181, CreatinineMgDL: 2.1, CystatinCMgL: 1.8}, 36.8},
	}
	cr, cys := registered(t, "ckid-u25-cr"), registered(t, "ckid-u25-cys")
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			v, steps := pedsCompute(t, e, tt.in)
			require.Equal(t, tt.want, pedsRound(v, 1), ckidU25RefSource)
			require.Equal(t, "eGFR", steps[len(steps)-1].Name)
			require.Equal(t, v, steps[len(steps)-1].Value, "last step is the result")
			// Reference code: eGFRU25ave = (eGFRU25scr + eGFRU25cys)/2, and
			// the steps show both parts.
			vCr, _ := pedsCompute(t, cr, tt.in)
			vCys, _ := pedsCompute(t, cys, tt.in)
			require.Equal(t, (vCr+vCys)/2, v)
			require.Equal(t, vCr, pedsStep(t, steps, "eGFRcr"))
			require.Equal(t, vCys, pedsStep(t, steps, "eGFRcys"))
			require.Equal(t, vCr, pedsStep(t, steps, "cr: eGFR"))
			require.Equal(t, vCys, pedsStep(t, steps, "cys: eGFR"))
			pedsStep(t, steps, "cr: K")
			pedsStep(t, steps, "cys: K")
		})
	}
}

func BenchmarkCKiDU25CrCys(b *testing.B) {
	e := registered(b, "ckid-u25-crcys")
	in := calc.Inputs{AgeYears: 15, Sex: calc.SexMale, HeightCM: 160, CreatinineMgDL: 1.9, CystatinCMgL: 1.6}
	for b.Loop() {
		if _, _, err := e.Compute(in); err != nil {
			b.Fatal(err)
		}
	}
}
