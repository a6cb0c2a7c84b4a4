package calc

import (
	"fmt"
	"math"
)

// ckidU25Cr is the CKiD U25 creatinine equation for children and young
// adults.
//
// Source: Pierce CB, Muñoz A, Ng DK, Warady BA, Furth SL, Schwartz GJ. Age-
// and sex-dependent clinical equations to estimate glomerular filtration
// rates in children and young adults with chronic kidney disease. Kidney Int.
// 2021;99(4):948-956. doi:10.1016/j.kint.2020.10.047.
//
//	eGFR = K × height(m) / Scr(mg/dL)
//	male:   K = 39.0 × 1.008^(age − 12)  for age < 12
//	        K = 39.0 × 1.045^(age − 12)  for 12 ≤ age < 18
//	        K = 50.8                     for age ≥ 18
//	female: K = 36.1 × 1.008^(age − 12)  for age < 12
//	        K = 36.1 × 1.023^(age − 12)  for 12 ≤ age < 18
//	        K = 41.4                     for age ≥ 18
//
// The constants and band edges are those of the study's published reference
// code (R, SAS and Stata), which computes K with age < 12, 12 ≤ age < 18 and
// age ≥ 18; the abstract gives the same end points (K from 35.7 at one year
// to 50.8 from 18 for males, 33.1 to 41.4 for females). K is continuous at 12
// but not exactly at 18: the adult constants are rounded, so K steps up by
// 0.023 % (male, 50.788 → 50.8) and 0.055 % (female, 41.377 → 41.4) there.
// Height in metres (height cm / 100); Scr IDMS-traceable.
//
// Age range: the cohort and the reference code cover 1 to 25 years; "U25"
// is read as under 25, so the range is [1, 25) and a 25-year-old is left to
// the adult equations.
//
// There is no equation-specific LOINC code; the policy's generic eGFR code
// (69405-9) is used.
func ckidU25Cr() Equation {
	return Equation{
		ID:       "ckid-u25-cr",
		Version:  "1",
		Name:     "CKiD U25 creatinine",
		Citation: "Pierce CB et al. Kidney Int 2021;99:948-956",
		// No equation-specific LOINC code exists: the policy's generic
		// 69405-9 is used.
		LOINC:     "",
		LOINCName: "",
		Unit:      UnitIndexed,
		MinAge:    1,
		MaxAge:    25,
		Needs:     NeedCreatinine | NeedHeight | NeedSex,
		Compute: func(in Inputs) (float64, []Step, error) {
			if in.Sex != SexFemale && in.Sex != SexMale {
				return 0, nil, errInput // the policy resolves unknown sex before calling
			}
			if !(in.CreatinineMgDL > 0) || math.IsInf(in.CreatinineMgDL, 0) ||
				!(in.HeightCM > 0) || math.IsInf(in.HeightCM, 0) ||
				!(in.AgeYears >= 0) || math.IsInf(in.AgeYears, 0) {
				return 0, nil, errInput
			}
			k, kFormula := ckidU25CrK(in.AgeYears, in.Sex)
			htM := in.HeightCM / 100
			ratio := htM / in.CreatinineMgDL
			v := k * ratio
			if math.IsNaN(v) || math.IsInf(v, 0) {
				return 0, nil, errInput
			}
			return v, []Step{
				step("K", k, "%s", kFormula),
				step("height (m)", htM, "%g cm / 100", in.HeightCM),
				step("height/Scr", ratio, "%.6g m / %g mg/dL", htM, in.CreatinineMgDL),
				step("eGFR", v, "%.6g × %.6g", k, ratio),
			}, nil
		},
	}
}

// ckidU25CrK returns the CKiD U25 creatinine constant K for an age and sex,
// with the formula that produced it.
func ckidU25CrK(age float64, sex Sex) (float64, string) {
	base, child, teen, adult := 36.1, 1.008, 1.023, 41.4
	if sex == SexMale {
		base, child, teen, adult = 39.0, 1.008, 1.045, 50.8
	}
	switch {
	case age < 12:
		return base * math.Pow(child, age-12), fmt.Sprintf("%g × %g^(%g − 12) (%s, age < 12)", base, child, age, sex)
	case age < 18:
		return base * math.Pow(teen, age-12), fmt.Sprintf("%g × %g^(%g − 12) (%s, 12 ≤ age < 18)", base, teen, age, sex)
	default:
		return adult, fmt.Sprintf("%g (%s, age ≥ 18)", adult, sex)
	}
}
