package calc_test

import (
	"math"
	"testing"

	"github.com/stretchr/testify/require"

	"filtrate/calc"
)

func TestEKFCCrMetadata(t *testing.T) {
	e := registered(t, "ekfc-cr")
	require.Equal(t, "1", e.Version)
	require.Empty(t, e.LOINC)       // no equation-specific LOINC code; policy uses generic 69405-9 (common practice)
	require.Equal(t, 2.0, e.MinAge) // Pottel 2021: developed and validated from age 2 to 100
	require.Zero(t, e.MaxAge)
	require.True(t, e.Needs.Has(calc.NeedCreatinine|calc.NeedSex))
	require.False(t, e.Needs.Has(calc.NeedHeight))
	require.Equal(t, []calc.Analyte{calc.Creatinine}, e.Uses())
}

func TestEKFCCrChecks(t *testing.T) {
	e := registered(t, "ekfc-cr")
	tests := []struct {
		name   string
		in     calc.Inputs
		want   float64 // unrounded
		places int     // decimals the source prints; compared after rounding when ≥ 0
		source string
	}{
		{
			name: "man 60 y 1.4 mg/dL",
			in:   calc.Inputs{AgeYears: 60, Sex: calc.SexMale, CreatinineMgDL: 1.4},
			// 1.4 × 88.4 = 123.76 µmol/L; /80 = 1.547; 1.547^-1.132 × 107.3 × 0.990^20
			want: 53.56, places: 2,
			source: "kidney.epi R package 1.3.0, egfr.ekfc.cr documented example (53.56)",
		},
		{
			name: "girl 10 y 0.5 mg/dL",
			in:   calc.Inputs{AgeYears: 10, Sex: calc.SexFemale, CreatinineMgDL: 0.5},
			// ln Q = 3.080 + 1.77 − 0.223 ln 10 − 0.596 + 0.0686 = 3.809124; Q = 45.110883
			// Scr = 44.2 µmol/L; 44.2/45.110883 = 0.979808 < 1; 0.979808^-0.322 × 107.3
			want: 108.007108, places: -1,
			source: "hand computation from the published formula (Pottel 2021)",
		},
		{
			name: "boy 10 y 0.5 mg/dL",
			in:   calc.Inputs{AgeYears: 10, Sex: calc.SexMale, CreatinineMgDL: 0.5},
			// ln Q = 3.200 + 2.59 − 0.543 ln 10 − 0.763 + 0.079 = 3.855696; Q = 47.261513
			// 44.2/47.261513 = 0.935222; ^-0.322 × 107.3
			want: 109.639035, places: -1,
			source: "hand computation from the published formula (Pottel 2021)",
		},
		{
			name: "boy 4 y 0.35 mg/dL",
			in:   calc.Inputs{AgeYears: 4, Sex: calc.SexMale, CreatinineMgDL: 0.35},
			// ln Q = 3.200 + 1.036 − 0.543 ln 4 − 0.12208 + 0.005056 = 3.366218; Q = 28.968764
			// 30.94/28.968764 = 1.068047 ≥ 1; ^-1.132 × 107.3
			want: 99.594524, places: -1,
			source: "hand computation from the published formula (Pottel 2021)",
		},
		{
			name: "girl 16 y 0.7 mg/dL",
			in:   calc.Inputs{AgeYears: 16, Sex: calc.SexFemale, CreatinineMgDL: 0.7},
			// ln Q = 3.080 + 2.832 − 0.223 ln 16 − 1.52576 + 0.2809856 = 4.048938; Q = 57.336551
			// 61.88/57.336551 = 1.079242; ^-1.132 × 107.3
			want: 98.425881, places: -1,
			source: "hand computation from the published formula (Pottel 2021)",
		},
		{
			name: "man 25 y 1.0 mg/dL (last year of the polynomial)",
			in:   calc.Inputs{AgeYears: 25, Sex: calc.SexMale, CreatinineMgDL: 1.0},
			// ln Q = 3.200 + 6.475 − 0.543 ln 25 − 4.76875 + 1.234375 = 4.392775; Q = 80.864541
			// 88.4/80.864541 = 1.093186; ^-1.132 × 107.3
			want: 97.005858, places: -1,
			source: "hand computation from the published formula (Pottel 2021)",
		},
		{
			name: "woman 30 y 1.2 mg/dL",
			in:   calc.Inputs{AgeYears: 30, Sex: calc.SexFemale, CreatinineMgDL: 1.2},
			// Q = 62; 106.08/62 = 1.710968; ^-1.132 × 107.3
			want: 58.421134, places: -1,
			source: "hand computation from the published formula (Pottel 2021)",
		},
		{
			name: "man 30 y 0.6 mg/dL",
			in:   calc.Inputs{AgeYears: 30, Sex: calc.SexMale, CreatinineMgDL: 0.6},
			// Q = 80; 53.04/80 = 0.663; ^-0.322 × 107.3
			want: 122.482027, places: -1,
			source: "hand computation from the published formula (Pottel 2021)",
		},
		{
			name: "woman 75 y 2.0 mg/dL",
			in:   calc.Inputs{AgeYears: 75, Sex: calc.SexFemale, CreatinineMgDL: 2.0},
			// Q = 62; 176.8/62 = 2.851613; ^-1.132 × 107.3 × 0.990^35
			want: 23.049898, places: -1,
			source: "hand computation from the published formula (Pottel 2021)",
		},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			v, steps := pedsCompute(t, e, tt.in)
			if tt.places >= 0 {
				require.Equal(t, tt.want, pedsRound(v, tt.places), "%s", tt.source)
			} else {
				require.InDelta(t, tt.want, v, 5e-6, "%s", tt.source)
			}
			require.Equal(t, v, steps[len(steps)-1].Value, "last step is the result")
			require.InDelta(t, tt.in.CreatinineMgDL*88.4, pedsStep(t, steps, "Scr (µmol/L)"), 1e-9)
		})
	}
}

func TestEKFCCrComputesInMicromolPerLitre(t *testing.T) {
	// The adult Q is 80/62 µmol/L (Pottel 2021); the 0.90/0.70 mg/dL printed
	// beside them are rounded (0.90 mg/dL = 79.56 µmol/L, 0.70 mg/dL = 61.88
	// µmol/L). Computing in µmol/L gives, for Scr/Q ≥ 1, (80/79.56)^1.132 − 1
	// = +0.63 % (male) and (62/61.88)^1.132 − 1 = +0.22 % (female) relative
	// to the mg/dL reading: hand computation.
	e := registered(t, "ekfc-cr")
	for _, tt := range []struct {
		sex   calc.Sex
		qMgDL float64
		diff  float64
	}{
		{calc.SexMale, 0.90, math.Pow(80/(0.9*88.4), 1.132) - 1},
		{calc.SexFemale, 0.70, math.Pow(62/(0.7*88.4), 1.132) - 1},
	} {
		in := calc.Inputs{AgeYears: 30, Sex: tt.sex, CreatinineMgDL: 1.2}
		v, _ := pedsCompute(t, e, in)
		mgdl := 107.3 * math.Pow(1.2/tt.qMgDL, -1.132)
		require.InDelta(t, tt.diff, v/mgdl-1, 1e-12, "%s", tt.sex)
		require.Greater(t, v/mgdl-1, 0.002, "the unit choice is visible: %s", tt.sex)
	}
	// A value received in µmol/L and converted to mg/dL gives back the same
	// µmol/L: 106 µmol/L woman 30 y.
	v, steps := pedsCompute(t, e, calc.Inputs{AgeYears: 30, Sex: calc.SexFemale, CreatinineMgDL: 106 / calc.CreatinineMgDLToUmolL})
	require.InDelta(t, 106, pedsStep(t, steps, "Scr (µmol/L)"), 1e-12)
	require.InDelta(t, 107.3*math.Pow(106.0/62, -1.132), v, 1e-12)
}

func TestEKFCCrStepsShowThePublishedCoefficients(t *testing.T) {
	// An auditor redoes the arithmetic from the steps: the polynomial is
	// printed with the coefficients as Pottel 2021 prints them.
	e := registered(t, "ekfc-cr")
	_, steps := pedsCompute(t, e, calc.Inputs{AgeYears: 10, Sex: calc.SexMale, CreatinineMgDL: 0.5})
	var formula string
	for _, s := range steps {
		if s.Name == "ln Q" {
			formula = s.Formula
		}
	}
	require.Equal(t, "3.200 + 0.259×10 − 0.543×ln(10) − 0.00763×10² + 0.0000790×10³ (male, age ≤ 25)", formula)
	_, steps = pedsCompute(t, e, calc.Inputs{AgeYears: 7.5, Sex: calc.SexFemale, CreatinineMgDL: 0.5})
	for _, s := range steps {
		if s.Name == "ln Q" {
			formula = s.Formula
		}
	}
	require.Equal(t, "3.080 + 0.177×7.5 − 0.223×ln(7.5) − 0.00596×7.5² + 0.0000686×7.5³ (female, age ≤ 25)", formula)
}

func BenchmarkEKFCCr(b *testing.B) {
	e := registered(b, "ekfc-cr")
	in := calc.Inputs{AgeYears: 16, Sex: calc.SexFemale, CreatinineMgDL: 0.7}
	for b.Loop() {
		if _, _, err := e.Compute(in); err != nil {
			b.Fatal(err)
		}
	}
}
