package calc_test

import (
	"math"
	"testing"

	"github.com/stretchr/testify/require"

	"filtrate/calc"
)

func TestBSAChecks(t *testing.T) {
	tests := []struct {
		name     string
		method   calc.BSAMethod
		h, w     float64
		want     float64 // unrounded, by hand from the published formula
		rounded  float64 // as the source prints it
		decimals int
		source   string
	}{
		{
			name: "Mosteller 180 cm 80 kg", method: calc.BSAMethodMosteller, h: 180, w: 80,
			// √(180 × 80 / 3600) = √4 = 2 exactly
			want: 2, rounded: 2, decimals: 3,
			source: "hand computation, Mosteller 1987 formula",
		},
		{
			name: "Mosteller 170 cm 75 kg", method: calc.BSAMethodMosteller, h: 170, w: 75,
			// √(12750 / 3600) = √3.541666… = 1.881932
			want: math.Sqrt(12750.0 / 3600), rounded: 1.882, decimals: 3,
			source: "pharmaverse/admiral test suite, compute_bsa Test 01.01 Mosteller (1.882)",
		},
		{
			name: "Mosteller 185 cm 90 kg", method: calc.BSAMethodMosteller, h: 185, w: 90,
			// √(16650 / 3600) = √4.625 = 2.150581
			want: math.Sqrt(4.625), rounded: 2.151, decimals: 3,
			source: "pharmaverse/admiral test suite, compute_bsa Test 01.02 Mosteller (2.151)",
		},
		{
			name: "Mosteller 170 cm 70 kg", method: calc.BSAMethodMosteller, h: 170, w: 70,
			// √(11900 / 3600) = √3.305556 = 1.818119
			want: math.Sqrt(11900.0 / 3600), rounded: 1.818, decimals: 3,
			source: "hand computation, Mosteller 1987 formula",
		},
		{
			name: "DuBois 170 cm 75 kg", method: calc.BSAMethodDuBois, h: 170, w: 75,
			// 0.007184 × 75^0.425 × 170^0.725 = 0.007184 × 6.26651 × 41.3957 = 1.863558
			want: 1.8635576337190223, rounded: 1.864, decimals: 3,
			source: "pharmaverse/admiral test suite, compute_bsa Test 02.01 DuBois-DuBois (1.864)",
		},
		{
			name: "DuBois 185 cm 90 kg", method: calc.BSAMethodDuBois, h: 185, w: 90,
			// 0.007184 × 90^0.425 × 185^0.725 = 2.141011
			want: 2.1410109736858636, rounded: 2.141, decimals: 3,
			source: "pharmaverse/admiral test suite, compute_bsa Test 02.02 DuBois-DuBois (2.141)",
		},
		{
			name: "DuBois 180 cm 80 kg", method: calc.BSAMethodDuBois, h: 180, w: 80,
			// 0.007184 × 80^0.425 × 180^0.725 = 1.996421
			want: 1.9964210222750447, rounded: 2.00, decimals: 2,
			source: "InsightRX/clinPK tests/testthat/test_calc_bsa.R, calc_bsa(80, 180) dubois (2.00)",
		},
		{
			name: "DuBois 170 cm 70 kg", method: calc.BSAMethodDuBois, h: 170, w: 70,
			// 0.007184 × 70^0.425 × 170^0.725 = 1.809708
			want: 1.809707801753247, rounded: 1.810, decimals: 3,
			source: "hand computation, DuBois 1916 formula (Python math.pow)",
		},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			got, err := calc.BSA(tt.method, tt.h, tt.w)
			require.NoError(t, err)
			require.InDelta(t, tt.want, got, 1e-12, tt.source)
			p := math.Pow(10, float64(tt.decimals))
			require.Equal(t, tt.rounded, math.Round(got*p)/p, tt.source)

			direct := calc.BSADuBois(tt.h, tt.w)
			if tt.method == calc.BSAMethodMosteller {
				direct = calc.BSAMosteller(tt.h, tt.w)
			}
			require.Equal(t, direct, got, "BSA dispatches to the named formula")
		})
	}
}

func TestBSAMethodNames(t *testing.T) {
	// The method names are configuration values; they must not drift.
	require.Equal(t, calc.BSAMethod("dubois"), calc.BSAMethodDuBois)
	require.Equal(t, calc.BSAMethod("mosteller"), calc.BSAMethodMosteller)
}

func TestBSARefuses(t *testing.T) {
	tests := []struct {
		name   string
		method calc.BSAMethod
		h, w   float64
	}{
		{"unknown method", "haycock", 170, 70},
		{"empty method", "", 170, 70},
		{"method is case-sensitive", "DuBois", 170, 70},
		{"height zero", calc.BSAMethodDuBois, 0, 70},
		{"weight zero", calc.BSAMethodMosteller, 170, 0},
		{"height negative", calc.BSAMethodMosteller, -170, 70},
		{"weight negative", calc.BSAMethodDuBois, 170, -70},
		{"height NaN", calc.BSAMethodDuBois, math.NaN(), 70},
		{"weight NaN", calc.BSAMethodMosteller, 170, math.NaN()},
		{"height infinite", calc.BSAMethodDuBois, math.Inf(1), 70},
		{"weight infinite", calc.BSAMethodMosteller, 170, math.Inf(1)},
		{"product overflows", calc.BSAMethodMosteller, math.MaxFloat64, math.MaxFloat64},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			v, err := calc.BSA(tt.method, tt.h, tt.w)
			require.Error(t, err)
			require.Zero(t, v)
			require.NotContains(t, err.Error(), "170", "no patient value in the error")
			require.NotContains(t, err.Error(), "70", "no patient value in the error")
		})
	}
}

// TestBSAProperties: both formulas give finite, positive values that rise
// with height and with weight over a grid covering infants to large adults,
// and agree with each other within 5 % for adult sizes (the two published
// formulas are close in adults; common practice, not a published bound).
func TestBSAProperties(t *testing.T) {
	heights := []float64{30, 50, 80, 120, 150, 170, 190, 250}
	weights := []float64{0.5, 3, 10, 30, 60, 90, 150, 400}
	for _, m := range []calc.BSAMethod{calc.BSAMethodDuBois, calc.BSAMethodMosteller} {
		for _, h := range heights {
			for _, w := range weights {
				v, err := calc.BSA(m, h, w)
				require.NoError(t, err)
				require.False(t, math.IsNaN(v) || math.IsInf(v, 0))
				require.Greater(t, v, 0.0)
				taller, err := calc.BSA(m, h*1.05, w)
				require.NoError(t, err)
				require.Greater(t, taller, v)
				heavier, err := calc.BSA(m, h, w*1.05)
				require.NoError(t, err)
				require.Greater(t, heavier, v)
			}
		}
	}
	for _, h := range []float64{155, 170, 185} {
		for _, w := range []float64{55, 70, 85} {
			d, m := calc.BSADuBois(h, w), calc.BSAMosteller(h, w)
			require.InEpsilon(t, d, m, 0.05, "h=%g w=%g", h, w)
		}
	}
}

func TestIndexDeindex(t *testing.T) {
	// 1.73 m² is the conventional reference surface area (common practice).
	require.Equal(t, 1.73, calc.ReferenceBSA)
	tests := []struct {
		name         string
		indexed, bsa float64
		wantNonIndex float64
		hand         string
	}{
		{"reference surface area is neutral", 60, 1.73, 60, "60 × 1.73 / 1.73"},
		{"larger patient", 60, 2.0, 60 * 2.0 / 1.73, "60 × 2.0 / 1.73 = 69.3642"},
		{"smaller patient", 90, 1.5, 90 * 1.5 / 1.73, "90 × 1.5 / 1.73 = 78.0347"},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			got := calc.Deindex(tt.indexed, tt.bsa)
			require.InDelta(t, tt.wantNonIndex, got, 1e-12, tt.hand)
			back := calc.Index(got, tt.bsa)
			require.InDelta(t, tt.indexed, back, 1e-12, "Index undoes Deindex")
		})
	}
	// Hand computation: 100 mL/min over 2.0 m² is 100 × 1.73 / 2 = 86.5 per 1.73 m².
	require.InDelta(t, 86.5, calc.Index(100, 2.0), 1e-12)
	// Hand computation: 2.0 m² by Mosteller (180 cm, 80 kg) de-indexes 86.5 back to 100 mL/min.
	bsa, err := calc.BSA(calc.BSAMethodMosteller, 180, 80)
	require.NoError(t, err)
	require.InDelta(t, 100, calc.Deindex(86.5, bsa), 1e-12)
}

func BenchmarkBSA(b *testing.B) {
	for _, m := range []calc.BSAMethod{calc.BSAMethodDuBois, calc.BSAMethodMosteller} {
		b.Run(string(m), func(b *testing.B) {
			for b.Loop() {
				if _, err := calc.BSA(m, 172.5, 68.4); err != nil {
					b.Fatal(err)
				}
			}
		})
	}
}
