package calc_test

import (
	"errors"
	"math"
	"strconv"
	"strings"
	"testing"

	"github.com/stretchr/testify/require"

	"filtrate/calc"
)

// unitAnalytes lists every analyte that has a canonical unit.
var unitAnalytes = []calc.Analyte{
	calc.Creatinine, calc.CystatinC, calc.Height, calc.Weight,
	calc.UrineCreatinine, calc.UrineVolume, calc.CollectionTime,
}

func TestCanonicalUnit(t *testing.T) {
	want := map[calc.Analyte]string{
		calc.Creatinine:      "mg/dL",
		calc.CystatinC:       "mg/L",
		calc.Height:          "cm",
		calc.Weight:          "kg",
		calc.UrineCreatinine: "mg/dL",
		calc.UrineVolume:     "mL",
		calc.CollectionTime:  "min",
	}
	require.Len(t, want, len(unitAnalytes))
	for a, u := range want {
		require.Equal(t, u, calc.CanonicalUnit(a), "analyte %s", a)
		require.True(t, calc.KnownUnit(a, u), "the canonical unit of %s is accepted", a)
		v, f, err := calc.ToCanonical(a, 2.5, u)
		require.NoError(t, err)
		require.Equal(t, 1.0, f, "the canonical unit converts with factor 1")
		require.Equal(t, 2.5, v)
	}
	require.Empty(t, calc.CanonicalUnit("potassium"))
}

// TestUnitAcceptedSpellings converts 1 unit of every accepted spelling and
// checks the factor. Factor sources: UCUM (ucum-essence.xml: [in_i] = 2.54
// cm; [lb_av] = 7000 [gr], [gr] = 64.79891 mg, so [lb_av] = 0.45359237 kg;
// m, g, L, dL, h, d are SI/UCUM prefixes and units); creatinine 88.4 µmol/L
// per mg/dL, see TestCreatinineFactorPinned.
func TestUnitAcceptedSpellings(t *testing.T) {
	const crUmol = 1 / 88.4 // mg/dL per µmol/L
	tests := []struct {
		analyte calc.Analyte
		unit    string
		factor  float64
	}{
		{calc.Creatinine, "mg/dL", 1},
		{calc.Creatinine, "mg/dl", 1},
		{calc.Creatinine, "MG/DL", 1},
		{calc.Creatinine, " mg/dL\t", 1},
		{calc.Creatinine, "umol/L", crUmol},
		{calc.Creatinine, "umol/l", crUmol},
		{calc.Creatinine, "UMOL/L", crUmol},
		{calc.Creatinine, "\u00b5mol/L", crUmol}, // µ MICRO SIGN
		{calc.Creatinine, "\u03bcmol/L", crUmol}, // μ GREEK SMALL LETTER MU
		{calc.Creatinine, "\u00b5mol/l", crUmol},
		{calc.Creatinine, "mmol/L", 1000 * crUmol},
		{calc.Creatinine, "MMOL/L", 1000 * crUmol},
		{calc.UrineCreatinine, "mg/dL", 1},
		{calc.UrineCreatinine, "umol/L", crUmol},
		{calc.UrineCreatinine, "\u00b5mol/L", crUmol},
		{calc.UrineCreatinine, "\u03bcmol/L", crUmol},
		{calc.UrineCreatinine, "mmol/L", 1000 * crUmol},
		{calc.CystatinC, "mg/L", 1},
		{calc.CystatinC, "mg/l", 1},
		{calc.Height, "cm", 1},
		{calc.Height, "CM", 1},
		{calc.Height, "m", 100},
		{calc.Height, "[in_i]", 2.54},
		{calc.Weight, "kg", 1},
		{calc.Weight, "KG", 1},
		{calc.Weight, "g", 0.001},
		{calc.Weight, "[lb_av]", 0.45359237},
		{calc.Weight, " [lb_av] ", 0.45359237},
		{calc.UrineVolume, "mL", 1},
		{calc.UrineVolume, "ml", 1},
		{calc.UrineVolume, "L", 1000},
		{calc.UrineVolume, "dL", 100},
		{calc.CollectionTime, "min", 1},
		{calc.CollectionTime, "h", 60},
		{calc.CollectionTime, "d", 1440},
	}
	for _, tt := range tests {
		t.Run(string(tt.analyte)+" "+tt.unit, func(t *testing.T) {
			require.True(t, calc.KnownUnit(tt.analyte, tt.unit))
			v, f, err := calc.ToCanonical(tt.analyte, 1, tt.unit)
			require.NoError(t, err)
			require.InDelta(t, tt.factor, f, 1e-15*tt.factor)
			require.Equal(t, f, v, "1 unit converts to the factor")
			back, err := calc.FromCanonical(tt.analyte, v, tt.unit)
			require.NoError(t, err)
			require.InDelta(t, 1, back, 1e-12, "FromCanonical undoes ToCanonical")
		})
	}
}

// TestUnitUCUMFactors derives the customary factors from UCUM's own
// definitions (ucum-essence.xml, classes intcust and avoirdupois).
func TestUnitUCUMFactors(t *testing.T) {
	v, _, err := calc.ToCanonical(calc.Height, 68, "[in_i]")
	require.NoError(t, err)
	require.InDelta(t, 68*2.54, v, 1e-12) // UCUM: [in_i] = 2.54 cm; 68 in = 172.72 cm
	require.InDelta(t, 172.72, v, 1e-12)

	const grainMG = 64.79891 // UCUM: [gr] = 64.79891 mg
	lbKG := 7000 * grainMG / 1e6
	require.InDelta(t, 0.45359237, lbKG, 1e-15) // UCUM: [lb_av] = 7000 [gr]
	v, _, err = calc.ToCanonical(calc.Weight, 150, "[lb_av]")
	require.NoError(t, err)
	require.InDelta(t, 150*lbKG, v, 1e-12) // 150 lb = 68.0388555 kg
	require.InDelta(t, 68.0388555, v, 1e-9)

	v, _, err = calc.ToCanonical(calc.Height, 1.72, "m")
	require.NoError(t, err)
	require.InDelta(t, 172, v, 1e-12) // SI: 1 m = 100 cm
}

// TestCreatinineFactorPinned shows where 88.4 comes from and pins the choice
// against the 88.42 some references print.
//
// Molar mass of creatinine C4H7N3O: 113.12 g/mol (USP 35–NF 30 Creatinine
// monograph "C4H7N3O 113.12"; the Wikipedia creatinine infobox "113.12
// g·mol−1"). By hand from standard atomic weights (C 12.011, H 1.008,
// N 14.007, O 15.999; from memory): 48.044 + 7.056 + 42.021 + 15.999 =
// 113.120. 1 mg/dL = 10 mg/L = 10/113.12 mmol/L = 88.40 µmol/L.
func TestCreatinineFactorPinned(t *testing.T) {
	molar := 4*12.011 + 7*1.008 + 3*14.007 + 15.999
	require.InDelta(t, 113.12, molar, 0.0005)
	exact := 10 / 113.12 * 1000 // µmol/L per mg/dL
	require.InDelta(t, 88.40, exact, 0.005)
	require.Equal(t, 88.4, math.Round(exact*10)/10)
	require.Equal(t, 88.4, calc.CreatinineMgDLToUmolL, "pinned: 88.4, not 88.42")

	// The choice shows in results: 85 µmol/L is 85/88.4 mg/dL, not 85/88.42.
	v, f, err := calc.ToCanonical(calc.Creatinine, 85, "µmol/L")
	require.NoError(t, err)
	require.Equal(t, 1/88.4, f)
	require.InDelta(t, 85/88.4, v, 1e-15) // 0.961538…
	require.Greater(t, math.Abs(v-85/88.42), 1e-4, "differs from the 88.42 factor (0.961321…)")

	// 1 mg/dL is 88.4 µmol/L and 0.0884 mmol/L.
	u, err := calc.FromCanonical(calc.Creatinine, 1, "umol/L")
	require.NoError(t, err)
	require.InDelta(t, 88.4, u, 1e-12)
	mm, err := calc.FromCanonical(calc.Creatinine, 1, "mmol/L")
	require.NoError(t, err)
	require.InDelta(t, 0.0884, mm, 1e-15)
}

func TestUnitUnknown(t *testing.T) {
	tests := []struct {
		analyte calc.Analyte
		unit    string
		why     string
	}{
		{calc.Creatinine, "", "blank unit"},
		{calc.Creatinine, "   ", "blank unit"},
		{calc.Creatinine, "mg/L", "mg/L is not an accepted creatinine unit"},
		{calc.Creatinine, "umol", "not a concentration"},
		{calc.Creatinine, "mg%", "legacy spelling not accepted"},
		{calc.Creatinine, "mg/100mL", "legacy spelling not accepted"},
		{calc.Creatinine, "mol/L", "not listed"},
		{calc.Creatinine, "mg / dL", "inner blanks are not folded"},
		{calc.Creatinine, "nmol/L", "not listed"},
		{calc.UrineCreatinine, "g/24h", "an excretion rate, not a concentration"},
		{calc.CystatinC, "mg/dL", "cystatin C is accepted only in mg/L"},
		{calc.CystatinC, "nmol/L", "not listed"},
		{calc.Height, "in", "only the UCUM code [in_i]"},
		{calc.Height, "[IN_I]", "UCUM's case-insensitive form is refused (bracketed atoms are matched exactly)"},
		{calc.Height, "ft", "not listed"},
		{calc.Height, "mm", "not listed"},
		{calc.Weight, "lb", "only the UCUM code [lb_av]"},
		{calc.Weight, "lbs", "not UCUM"},
		{calc.Weight, "[LB_AV]", "UCUM's case-insensitive form is refused"},
		{calc.Weight, "[oz_av]", "not listed"},
		{calc.UrineVolume, "[gal_us]", "not listed"},
		{calc.CollectionTime, "s", "not listed"},
		{calc.CollectionTime, "hours", "not UCUM"},
		{"potassium", "mmol/L", "unknown analyte"},
	}
	for _, tt := range tests {
		t.Run(string(tt.analyte)+" "+tt.unit, func(t *testing.T) {
			require.False(t, calc.KnownUnit(tt.analyte, tt.unit), tt.why)

			v, f, err := calc.ToCanonical(tt.analyte, 0.92, tt.unit)
			require.Error(t, err, tt.why)
			require.Zero(t, v)
			require.Zero(t, f)
			var ue *calc.UnitError
			require.True(t, errors.As(err, &ue), "a *UnitError")
			require.Equal(t, tt.analyte, ue.Analyte)
			require.Equal(t, tt.unit, ue.Unit, "the unit as received")
			require.NotContains(t, err.Error(), "0.92", "no value in the error string")
			require.False(t, errors.Is(err, calc.ErrNotFinite))

			_, err = calc.FromCanonical(tt.analyte, 0.92, tt.unit)
			require.True(t, errors.As(err, &ue))
		})
	}
}

func TestToCanonicalNotFinite(t *testing.T) {
	tests := []struct {
		name    string
		analyte calc.Analyte
		value   float64
		unit    string
	}{
		{"overflow in conversion", calc.Creatinine, 1e308, "mmol/L"},
		{"overflow in conversion, metres", calc.Height, math.MaxFloat64, "m"},
		{"NaN", calc.Creatinine, math.NaN(), "mg/dL"},
		{"+Inf", calc.Weight, math.Inf(1), "kg"},
		{"-Inf", calc.CystatinC, math.Inf(-1), "mg/L"},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			v, f, err := calc.ToCanonical(tt.analyte, tt.value, tt.unit)
			require.ErrorIs(t, err, calc.ErrNotFinite)
			require.Zero(t, v)
			require.Zero(t, f)
			var ue *calc.UnitError
			require.False(t, errors.As(err, &ue), "a known unit is not a unit error")
		})
	}
	// FromCanonical divides: 1e308 kg is 1e311 g.
	_, err := calc.FromCanonical(calc.Weight, 1e308, "g")
	require.ErrorIs(t, err, calc.ErrNotFinite)
	_, err = calc.FromCanonical(calc.Creatinine, math.NaN(), "umol/L")
	require.ErrorIs(t, err, calc.ErrNotFinite)
	// The largest finite result is still accepted.
	v, _, err := calc.ToCanonical(calc.Creatinine, math.MaxFloat64, "mg/dL")
	require.NoError(t, err)
	require.Equal(t, math.MaxFloat64, v)
}

func TestParseValue(t *testing.T) {
	tests := []struct {
		text   string
		want   float64
		reason calc.Reason
	}{
		{"0.92", 0.92, ""},
		{" 1.05 ", 1.05, ""},
		{"\t85\n", 85, ""},
		{"+0.9", 0.9, ""},
		{".5", 0.5, ""},
		{"1.", 1, ""},
		{"1e1", 10, ""}, // decimal exponent notation is a number
		{"1E-1", 0.1, ""},
		{"-0.5", -0.5, ""}, // parsed; the plausibility check refuses it
		{"0", 0, ""},

		{"<0.2", 0, calc.ReasonValueCensored},
		{">20", 0, calc.ReasonValueCensored},
		{"< 0.2", 0, calc.ReasonValueCensored},
		{" >20 ", 0, calc.ReasonValueCensored},
		{"<=0.2", 0, calc.ReasonValueCensored},
		{">=20", 0, calc.ReasonValueCensored},
		{"\u22640.2", 0, calc.ReasonValueCensored}, // ≤
		{"\u226520", 0, calc.ReasonValueCensored},  // ≥
		{"<", 0, calc.ReasonValueCensored},

		{"", 0, calc.ReasonInputMissing},
		{"   ", 0, calc.ReasonInputMissing},
		{"\t\n", 0, calc.ReasonInputMissing},

		{"abc", 0, calc.ReasonValueNotNumeric},
		{"0,92", 0, calc.ReasonValueNotNumeric}, // decimal comma is not guessed
		{"0.9 mg/dL", 0, calc.ReasonValueNotNumeric},
		{"0.2<", 0, calc.ReasonValueNotNumeric},
		{"=0.9", 0, calc.ReasonValueNotNumeric},
		{"\u22120.5", 0, calc.ReasonValueNotNumeric}, // − MINUS SIGN
		{"1 000", 0, calc.ReasonValueNotNumeric},
		{"1_000", 0, calc.ReasonValueNotNumeric},
		{"NaN", 0, calc.ReasonValueNotNumeric},
		{"nan", 0, calc.ReasonValueNotNumeric},
		{"Inf", 0, calc.ReasonValueNotNumeric},
		{"+Inf", 0, calc.ReasonValueNotNumeric},
		{"-infinity", 0, calc.ReasonValueNotNumeric},
		{"0x1p-2", 0, calc.ReasonValueNotNumeric}, // hexadecimal float, 0.25 to strconv
		{"0X1P-2", 0, calc.ReasonValueNotNumeric},
		{"0x10", 0, calc.ReasonValueNotNumeric},
		{"1e400", 0, calc.ReasonValueNotNumeric}, // overflows float64
		{"-1e400", 0, calc.ReasonValueNotNumeric},
		{"hemolysed", 0, calc.ReasonValueNotNumeric},
		{"see comment", 0, calc.ReasonValueNotNumeric},
	}
	for _, tt := range tests {
		t.Run(strconv.Quote(tt.text), func(t *testing.T) {
			v, reason := calc.ParseValue(tt.text)
			require.Equal(t, tt.reason, reason)
			require.Equal(t, tt.want, v)
		})
	}
}

// TestDefaultPlausible checks the wrong-unit catches the ranges exist for
// (the ranges are common practice, see DefaultPlausible).
func TestDefaultPlausible(t *testing.T) {
	p := calc.DefaultPlausible()
	conv := func(a calc.Analyte, v float64, unit string) float64 {
		t.Helper()
		c, _, err := calc.ToCanonical(a, v, unit)
		require.NoError(t, err)
		return c
	}
	tests := []struct {
		name    string
		analyte calc.Analyte
		value   float64
		unit    string
		inside  bool
	}{
		{"µmol/L value labelled mg/dL", calc.Creatinine, 85, "mg/dL", false},
		{"mg/dL value labelled µmol/L", calc.Creatinine, 0.9, "\u00b5mol/L", false}, // 0.0102 mg/dL
		{"mg/dL value labelled μmol/L (Greek mu)", calc.Creatinine, 0.9, "\u03bcmol/L", false},
		{"typical µmol/L", calc.Creatinine, 85, "umol/L", true},
		{"typical mg/dL", calc.Creatinine, 0.9, "mg/dL", true},
		{"typical mmol/L", calc.Creatinine, 0.085, "mmol/L", true},
		{"negative creatinine", calc.Creatinine, -0.5, "mg/dL", false},
		{"zero creatinine", calc.Creatinine, 0, "mg/dL", false},
		{"height in m labelled cm", calc.Height, 1.72, "cm", false},
		{"height in m", calc.Height, 1.72, "m", true},
		{"weight in g labelled kg", calc.Weight, 70000, "kg", false},
		{"weight in g", calc.Weight, 70000, "g", true},
		{"cystatin C typical", calc.CystatinC, 0.9, "mg/L", true},
		{"cystatin C in nmol/L-sized number", calc.CystatinC, 67, "mg/L", false},
		{"24 h collection in hours", calc.CollectionTime, 24, "h", true},
		{"24 h collection labelled min", calc.CollectionTime, 24, "min", false},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			r, ok := p[tt.analyte]
			require.True(t, ok)
			require.Equal(t, tt.inside, r.Contains(conv(tt.analyte, tt.value, tt.unit)))
		})
	}

	for _, a := range unitAnalytes {
		r, ok := p[a]
		require.True(t, ok, "a range for %s", a)
		require.Greater(t, r.Min, 0.0, "%s: zero and negative values are implausible", a)
		require.Less(t, r.Min, r.Max, a)
		require.True(t, r.Contains(r.Min), "inclusive lower bound")
		require.True(t, r.Contains(r.Max), "inclusive upper bound")
		require.False(t, r.Contains(math.Nextafter(r.Min, math.Inf(-1))))
		require.False(t, r.Contains(math.Nextafter(r.Max, math.Inf(1))))
		require.False(t, r.Contains(math.NaN()))
		require.False(t, r.Contains(math.Inf(1)))
	}

	// Each call returns a fresh map: no package-level mutable state.
	p[calc.Creatinine] = calc.Range{Min: 0, Max: 1000}
	require.False(t, calc.DefaultPlausible()[calc.Creatinine].Contains(85))
}

// FuzzParseValue: ParseValue never panics; an accepted value is finite and is
// exactly what strconv reads from the trimmed text; a refusal returns 0 with
// one of the three input reasons.
func FuzzParseValue(f *testing.F) {
	for _, s := range []string{
		"0.92", " 85 ", "<0.2", ">20", "<=0.2", ">=20", "\u22640.2", "\u226520",
		"", "   ", "abc", "0,92", "NaN", "Inf", "-Infinity", "0x1p-2", "1_000",
		"1e400", "-0.5", "1e-320", "\u2212 1", "\xff\xfe",
	} {
		f.Add(s)
	}
	f.Fuzz(func(t *testing.T, text string) {
		v, reason := calc.ParseValue(text)
		switch reason {
		case "":
			if math.IsNaN(v) || math.IsInf(v, 0) {
				t.Fatalf("accepted a non-finite value from %q", text)
			}
			trimmed := strings.TrimSpace(text)
			if strings.HasPrefix(trimmed, "<") || strings.HasPrefix(trimmed, ">") ||
				strings.HasPrefix(trimmed, "\u2264") || strings.HasPrefix(trimmed, "\u2265") {
				t.Fatalf("accepted a censored value %q", text)
			}
			want, err := strconv.ParseFloat(trimmed, 64)
			if err != nil || want != v {
				t.Fatalf("ParseValue(%q) = %v, strconv says %v, %v", text, v, want, err)
			}
		case calc.ReasonInputMissing, calc.ReasonValueCensored, calc.ReasonValueNotNumeric:
			if v != 0 {
				t.Fatalf("refused %q with %s but returned %v", text, reason, v)
			}
		default:
			t.Fatalf("unexpected reason %q for %q", reason, text)
		}
	})
}

// FuzzToCanonical: ToCanonical never panics; an accepted conversion is
// finite, uses a positive finite factor of a known unit, and equals value ×
// factor; a refusal is a *UnitError for an unknown unit or ErrNotFinite.
func FuzzToCanonical(f *testing.F) {
	f.Add(0.92, "mg/dL", uint8(0))
	f.Add(85.0, "\u00b5mol/L", uint8(0))
	f.Add(85.0, "\u03bcmol/L", uint8(4))
	f.Add(1e308, "mmol/L", uint8(0))
	f.Add(math.MaxFloat64, "m", uint8(2))
	f.Add(math.Inf(1), "kg", uint8(3))
	f.Add(math.NaN(), "mg/L", uint8(1))
	f.Add(68.0, "[in_i]", uint8(2))
	f.Add(150.0, "[lb_av]", uint8(3))
	f.Add(1.5, "L", uint8(5))
	f.Add(24.0, "h", uint8(6))
	f.Add(5e-324, "umol/L", uint8(0))
	f.Add(12.0, "bogus", uint8(1))
	f.Fuzz(func(t *testing.T, value float64, unit string, which uint8) {
		a := unitAnalytes[int(which)%len(unitAnalytes)]
		v, factor, err := calc.ToCanonical(a, value, unit)
		if err != nil {
			var ue *calc.UnitError
			switch {
			case errors.As(err, &ue):
				if calc.KnownUnit(a, unit) {
					t.Fatalf("unit error for known unit %q of %s", unit, a)
				}
			case errors.Is(err, calc.ErrNotFinite):
				if !calc.KnownUnit(a, unit) {
					t.Fatalf("not-finite error for unknown unit %q of %s", unit, a)
				}
			default:
				t.Fatalf("unexpected error type %T: %v", err, err)
			}
			if v != 0 || factor != 0 {
				t.Fatalf("error with non-zero results %v, %v", v, factor)
			}
			return
		}
		if math.IsNaN(v) || math.IsInf(v, 0) {
			t.Fatalf("ToCanonical(%s, %v, %q) = %v, not finite", a, value, unit, v)
		}
		if !(factor > 0) || math.IsInf(factor, 0) {
			t.Fatalf("factor %v for %q", factor, unit)
		}
		if !calc.KnownUnit(a, unit) {
			t.Fatalf("accepted unknown unit %q for %s", unit, a)
		}
		if v != value*factor {
			t.Fatalf("%v × %v = %v, got %v", value, factor, value*factor, v)
		}
	})
}
