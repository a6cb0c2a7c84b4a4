package calc_test

import (
	"math"
	"testing"

	"github.com/stretchr/testify/require"

	"filtrate/calc"
)

func TestCockcroftGaultMetadata(t *testing.T) {
	e := registered(t, "cockcroft-gault")
	require.Equal(t, "1", e.Version)
	// LOINC 35591-7 "Creatinine renal clearance predicted by Cockcroft-Gault
	// formula": LOINC table extracts (long name and short name "Creat Cl
	// predicted SerPl C-G-vRate") found in public repositories; not checked on
	// loinc.org.
	require.Equal(t, "35591-7", e.LOINC)
	require.Equal(t, "Creatinine renal clearance predicted by Cockcroft-Gault formula", e.LOINCName)
	require.Equal(t, calc.UnitNotIndexed, e.Unit) // Cockcroft & Gault 1976: mL/min, not indexed
	require.Equal(t, 18.0, e.MinAge)              // Cockcroft & Gault 1976: derived in patients aged 18-92
	require.Zero(t, e.MaxAge)
	require.True(t, e.Needs.Has(calc.NeedCreatinine|calc.NeedWeight|calc.NeedSex))
	require.False(t, e.Needs.Has(calc.NeedHeight))
	require.False(t, e.Needs.Has(calc.NeedTimedUrine))
	require.Equal(t, []calc.Analyte{calc.Creatinine}, e.Uses())
	got, ok := calc.Builtin().Get("cockcroft-gault", "1")
	require.True(t, ok)
	require.Equal(t, e.ID, got.ID)
}

func TestCockcroftGaultChecks(t *testing.T) {
	e := registered(t, "cockcroft-gault")
	tests := []struct {
		name    string
		in      calc.Inputs
		want    float64 // unrounded, from the formula
		rounded float64 // as the source prints it, when it prints a rounded value
		source  string
	}{
		{
			name: "male 55 y 90 kg 1.09 mg/dL",
			in:   calc.Inputs{AgeYears: 55, Sex: calc.SexMale, WeightKG: 90, CreatinineMgDL: 1.09},
			// (140-55) × 90 / (72 × 1.09) = 7650 / 78.48
			want: 7650.0 / 78.48, rounded: 97,
			source: "pharmaverse/admiral tests/testthat/test-compute_kidney.R Test 01.03 (97, from the NKF Cockcroft-Gault calculator)",
		},
		{
			name: "female 65 y 60 kg 85 µmol/L",
			in:   calc.Inputs{AgeYears: 65, Sex: calc.SexFemale, WeightKG: 60, CreatinineMgDL: 85 / calc.CreatinineMgDLToUmolL},
			// (140-65) × 60 / (72 × 85/88.4) × 0.85 = 4500 / 69.2308 × 0.85 = 65 × 0.85
			want: 55.25, rounded: 55,
			source: "pharmaverse/admiral tests/testthat/test-compute_kidney.R Test 01.04 (55, from the NKF Cockcroft-Gault calculator)",
		},
		{
			name: "male 60 y 60 kg 0.5 mg/dL",
			in:   calc.Inputs{AgeYears: 60, Sex: calc.SexMale, WeightKG: 60, CreatinineMgDL: 0.5},
			// 80 × 60 / 36 = 133.333…
			want: 400.0 / 3, rounded: 133.33,
			source: "dpastoor/clincalc src/__tests__/renalFunction.test.ts (\"133.33\")",
		},
		{
			name: "female 60 y 60 kg 0.5 mg/dL",
			in:   calc.Inputs{AgeYears: 60, Sex: calc.SexFemale, WeightKG: 60, CreatinineMgDL: 0.5},
			// 133.333… × 0.85 = 113.333…
			want: 400.0 / 3 * 0.85, rounded: 113.33,
			source: "dpastoor/clincalc src/__tests__/renalFunction.test.ts (\"113.33\")",
		},
		{
			name: "male 40 y 72 kg 1.0 mg/dL",
			in:   calc.Inputs{AgeYears: 40, Sex: calc.SexMale, WeightKG: 72, CreatinineMgDL: 1},
			// hand computation from Cockcroft & Gault 1976: 100 × 72 / 72 = 100
			want:   100,
			source: "hand computation, Cockcroft & Gault 1976 formula",
		},
		{
			name: "female 18 y 50 kg 0.6 mg/dL",
			in:   calc.Inputs{AgeYears: 18, Sex: calc.SexFemale, WeightKG: 50, CreatinineMgDL: 0.6},
			// hand computation: 122 × 50 / 43.2 × 0.85 = 6100 / 43.2 × 0.85 = 120.0231…
			want:   6100 / 43.2 * 0.85,
			source: "hand computation, Cockcroft & Gault 1976 formula",
		},
		{
			name: "male 139.5 y 70 kg 1 mg/dL",
			in:   calc.Inputs{AgeYears: 139.5, Sex: calc.SexMale, WeightKG: 70, CreatinineMgDL: 1},
			// hand computation: 0.5 × 70 / 72 = 0.486…; the formula stays positive below 140
			want:   35.0 / 72,
			source: "hand computation, Cockcroft & Gault 1976 formula",
		},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			got, steps, err := e.Compute(tt.in)
			require.NoError(t, err, tt.source)
			require.InDelta(t, tt.want, got, 1e-9, tt.source)
			if tt.rounded != 0 {
				digits := 0.0
				if tt.rounded != math.Trunc(tt.rounded) {
					digits = 2
				}
				p := math.Pow(10, digits)
				require.Equal(t, tt.rounded, math.Round(got*p)/p, tt.source)
			}
			require.Len(t, steps, 5)
			require.Equal(t, got, steps[len(steps)-1].Value, "last step is the result")
			require.Equal(t, 140-tt.in.AgeYears, steps[0].Value)
			for _, s := range steps {
				require.NotEmpty(t, s.Name)
				require.NotEmpty(t, s.Formula)
			}
		})
	}
}

func TestCockcroftGaultRefuses(t *testing.T) {
	e := registered(t, "cockcroft-gault")
	ok := calc.Inputs{AgeYears: 50, Sex: calc.SexMale, WeightKG: 70, CreatinineMgDL: 1}
	tests := []struct {
		name   string
		mutate func(*calc.Inputs)
	}{
		{"age 140 gives zero clearance", func(in *calc.Inputs) { in.AgeYears = 140 }},
		{"age above 140 gives negative clearance", func(in *calc.Inputs) { in.AgeYears = 150 }},
		{"sex unknown", func(in *calc.Inputs) { in.Sex = calc.SexUnknown }},
		{"creatinine zero", func(in *calc.Inputs) { in.CreatinineMgDL = 0 }},
		{"creatinine negative", func(in *calc.Inputs) { in.CreatinineMgDL = -1 }},
		{"creatinine NaN", func(in *calc.Inputs) { in.CreatinineMgDL = math.NaN() }},
		{"weight zero", func(in *calc.Inputs) { in.WeightKG = 0 }},
		{"weight infinite", func(in *calc.Inputs) { in.WeightKG = math.Inf(1) }},
		{"age NaN", func(in *calc.Inputs) { in.AgeYears = math.NaN() }},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			in := ok
			tt.mutate(&in)
			v, steps, err := e.Compute(in)
			require.Error(t, err)
			require.Zero(t, v)
			require.Nil(t, steps)
		})
	}
	_, _, err := e.Compute(ok)
	require.NoError(t, err, "the unmutated input is accepted")
}

// TestCockcroftGaultProperties checks, over a grid of adult inputs, that the
// estimate is finite and positive, strictly decreases as creatinine rises,
// that the female value is 0.85 × the male value (Cockcroft & Gault 1976:
// "15% less in females"), and that the last step is the returned value.
func TestCockcroftGaultProperties(t *testing.T) {
	e := registered(t, "cockcroft-gault")
	creats := []float64{0.1, 0.3, 0.5, 0.7, 0.9, 1.2, 2, 4, 8, 15, 25}
	for _, age := range []float64{18, 30, 45, 60, 75, 90, 105, 120, 139} {
		for _, wt := range []float64{0.5, 30, 60, 90, 150, 250, 400} {
			for _, sex := range []calc.Sex{calc.SexFemale, calc.SexMale} {
				prev := math.Inf(1)
				for _, cr := range creats {
					in := calc.Inputs{AgeYears: age, Sex: sex, WeightKG: wt, CreatinineMgDL: cr}
					v, steps, err := e.Compute(in)
					require.NoError(t, err)
					require.False(t, math.IsNaN(v) || math.IsInf(v, 0), "finite at %+v", in)
					require.Greater(t, v, 0.0)
					require.Less(t, v, prev, "decreases with creatinine at %+v", in)
					require.Equal(t, v, steps[len(steps)-1].Value)
					prev = v
					if sex == calc.SexFemale {
						in.Sex = calc.SexMale
						m, _, err := e.Compute(in)
						require.NoError(t, err)
						require.InDelta(t, 0.85*m, v, 1e-9*m)
					}
				}
			}
		}
	}
}

func BenchmarkCockcroftGault(b *testing.B) {
	e := registered(b, "cockcroft-gault")
	in := calc.Inputs{AgeYears: 67, Sex: calc.SexFemale, WeightKG: 64, CreatinineMgDL: 1.1}
	for b.Loop() {
		if _, _, err := e.Compute(in); err != nil {
			b.Fatal(err)
		}
	}
}
