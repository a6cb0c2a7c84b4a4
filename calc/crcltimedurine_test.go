package calc_test

import (
	"math"
	"testing"

	"github.com/stretchr/testify/require"

	"filtrate/calc"
)

func TestTimedUrineMetadata(t *testing.T) {
	e := registered(t, "crcl-timed-urine")
	require.Equal(t, "1", e.Version)
	// LOINC 2164-2 "Creatinine renal clearance in 24 hour Urine and Serum or
	// Plasma": FHIR implementation guides and a LOINC table extract (short name
	// "Creat Cl 24h Ur+SerPl-vRate", unit mL/min) in public repositories; not
	// checked on loinc.org.
	require.Equal(t, "2164-2", e.LOINC)
	require.Equal(t, "Creatinine renal clearance in 24 hour Urine and Serum or Plasma", e.LOINCName)
	require.Equal(t, calc.UnitNotIndexed, e.Unit)
	require.Zero(t, e.MinAge) // a measured clearance applies at any age (common practice)
	require.Zero(t, e.MaxAge)
	require.True(t, e.Needs.Has(calc.NeedCreatinine|calc.NeedTimedUrine))
	require.False(t, e.Needs.Has(calc.NeedSex), "a measured clearance needs no sex")
	require.False(t, e.Needs.Has(calc.NeedWeight))
	require.False(t, e.Needs.Has(calc.NeedHeight))
	require.Equal(t, []calc.Analyte{calc.Creatinine, calc.UrineCreatinine}, e.Uses())
}

// TestTimedUrineChecks uses hand computations of the clearance definition
// CrCl = U × V / (P × t) (Tietz Textbook of Clinical Chemistry, kidney
// function chapter; edition from memory).
func TestTimedUrineChecks(t *testing.T) {
	e := registered(t, "crcl-timed-urine")
	tests := []struct {
		name     string
		u, v     float64 // urine creatinine mg/dL, urine volume mL
		p, tMin  float64 // plasma creatinine mg/dL, collection min
		want     float64
		wantFlow float64
	}{
		// 120 × 1440 / (1.2 × 1440) = 100; flow 1 mL/min
		{"24 h, flow 1 mL/min", 120, 1440, 1.2, 1440, 100, 1},
		// 90 × 2160 / (1.0 × 1440) = 194400 / 1440 = 135; flow 1.5 mL/min
		{"24 h, flow 1.5 mL/min", 90, 2160, 1.0, 1440, 135, 1.5},
		// 100 × 1500 / (1.2 × 1440) = 150000 / 1728 = 86.8055…
		{"24 h, 1500 mL", 100, 1500, 1.2, 1440, 150000.0 / 1728, 1500.0 / 1440},
		// 12-hour collection: 60 × 900 / (0.9 × 720) = 54000 / 648 = 83.333…
		{"12 h collection", 60, 900, 0.9, 720, 54000.0 / 648, 1.25},
		// child, 6-hour collection: 40 × 150 / (0.3 × 360) = 6000 / 108 = 55.555…
		{"6 h collection, low creatinine", 40, 150, 0.3, 360, 6000.0 / 108, 150.0 / 360},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			in := calc.Inputs{AgeYears: 40, UrineCreatinineMgDL: tt.u, UrineVolumeML: tt.v, CreatinineMgDL: tt.p, CollectionMin: tt.tMin}
			got, steps, err := e.Compute(in)
			require.NoError(t, err)
			require.InDelta(t, tt.want, got, 1e-9)
			require.Len(t, steps, 3)
			require.InDelta(t, tt.wantFlow, steps[0].Value, 1e-12, "urine flow V/t")
			require.InDelta(t, tt.u/tt.p, steps[1].Value, 1e-12, "U/P")
			require.Equal(t, got, steps[len(steps)-1].Value, "last step is the result")
		})
	}
}

// TestTimedUrineUnitsCancel converts SI inputs through ToCanonical: U and P
// share the creatinine factor, so µmol/L gives the same clearance as mg/dL,
// and a collection stated in hours gives the same as one in minutes.
func TestTimedUrineUnitsCancel(t *testing.T) {
	e := registered(t, "crcl-timed-urine")
	conv := func(a calc.Analyte, v float64, unit string) float64 {
		t.Helper()
		c, _, err := calc.ToCanonical(a, v, unit)
		require.NoError(t, err)
		return c
	}
	si := calc.Inputs{
		UrineCreatinineMgDL: conv(calc.UrineCreatinine, 10608, "umol/L"), // 120 mg/dL × 88.4
		CreatinineMgDL:      conv(calc.Creatinine, 106.08, "µmol/L"),     // 1.2 mg/dL × 88.4
		UrineVolumeML:       conv(calc.UrineVolume, 1.44, "L"),
		CollectionMin:       conv(calc.CollectionTime, 24, "h"),
	}
	got, _, err := e.Compute(si)
	require.NoError(t, err)
	require.InDelta(t, 100, got, 1e-9) // hand computation: same as 120 × 1440 / (1.2 × 1440)
}

func TestTimedUrineRefuses(t *testing.T) {
	e := registered(t, "crcl-timed-urine")
	ok := calc.Inputs{UrineCreatinineMgDL: 100, UrineVolumeML: 1500, CreatinineMgDL: 1, CollectionMin: 1440}
	tests := []struct {
		name   string
		mutate func(*calc.Inputs)
	}{
		{"urine creatinine missing", func(in *calc.Inputs) { in.UrineCreatinineMgDL = 0 }},
		{"urine volume missing", func(in *calc.Inputs) { in.UrineVolumeML = 0 }},
		{"plasma creatinine missing", func(in *calc.Inputs) { in.CreatinineMgDL = 0 }},
		{"collection time missing", func(in *calc.Inputs) { in.CollectionMin = 0 }},
		{"collection time negative", func(in *calc.Inputs) { in.CollectionMin = -60 }},
		{"urine volume NaN", func(in *calc.Inputs) { in.UrineVolumeML = math.NaN() }},
		{"urine creatinine infinite", func(in *calc.Inputs) { in.UrineCreatinineMgDL = math.Inf(1) }},
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

// TestTimedUrineProperties checks over a grid that the clearance is finite
// and positive, rises with urine creatinine and volume, falls with plasma
// creatinine and collection time, and that sex does not change it.
func TestTimedUrineProperties(t *testing.T) {
	e := registered(t, "crcl-timed-urine")
	grid := []float64{1, 10, 50, 100, 300, 1000}
	plasma := []float64{0.1, 0.5, 1, 3, 10, 25}
	times := []float64{60, 240, 720, 1440, 2880}
	for _, u := range grid {
		for _, vol := range []float64{10, 500, 1500, 4000, 15000} {
			for _, p := range plasma {
				for _, tm := range times {
					in := calc.Inputs{UrineCreatinineMgDL: u, UrineVolumeML: vol, CreatinineMgDL: p, CollectionMin: tm}
					v, steps, err := e.Compute(in)
					require.NoError(t, err)
					require.False(t, math.IsNaN(v) || math.IsInf(v, 0))
					require.Greater(t, v, 0.0)
					require.Equal(t, v, steps[len(steps)-1].Value)

					more := func(mut func(*calc.Inputs)) float64 {
						x := in
						mut(&x)
						r, _, err := e.Compute(x)
						require.NoError(t, err)
						return r
					}
					require.Greater(t, more(func(x *calc.Inputs) { x.UrineCreatinineMgDL *= 1.1 }), v)
					require.Greater(t, more(func(x *calc.Inputs) { x.UrineVolumeML *= 1.1 }), v)
					require.Less(t, more(func(x *calc.Inputs) { x.CreatinineMgDL *= 1.1 }), v)
					require.Less(t, more(func(x *calc.Inputs) { x.CollectionMin *= 1.1 }), v)
					require.Equal(t, v, more(func(x *calc.Inputs) { x.Sex = calc.SexFemale }))
				}
			}
		}
	}
}

func BenchmarkCrClTimedUrine(b *testing.B) {
	e := registered(b, "crcl-timed-urine")
	in := calc.Inputs{UrineCreatinineMgDL: 96, UrineVolumeML: 1650, CreatinineMgDL: 1.05, CollectionMin: 1440}
	for b.Loop() {
		if _, _, err := e.Compute(in); err != nil {
			b.Fatal(err)
		}
	}
}
