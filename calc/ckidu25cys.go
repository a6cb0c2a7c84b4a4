package calc

import (
	"fmt"
	"math"
)

// ckidU25Cys is the CKiD U25 cystatin C equation for children and young
// adults.
//
// Source: Pierce CB, Muñoz A, Ng DK, Warady BA, Furth SL, Schwartz GJ. Age-
// and sex-dependent clinical equations to estimate glomerular filtration
// rates in children and young adults with chronic kidney disease. Kidney Int.
// 2021;99(4):948-956. doi:10.1016/j.kint.2020.10.047.
//
//	eGFR = K / Scys(mg/L)
//	male:   K = 87.2 × 1.011^(age − 15)  for age < 15
//	        K = 87.2 × 0.960^(age − 15)  for 15 ≤ age < 18
//	        K = 77.1                     for age ≥ 18
//	female: K = 79.9 × 1.004^(age − 12)  for age < 12
//	        K = 79.9 × 0.974^(age − 12)  for 12 ≤ age < 18
//	        K = 68.3                     for age ≥ 18
//
// The bands differ by sex (male edges at 15 and 18, female at 12 and 18), as
// in the study's published reference code (R, SAS and Stata). K is
// continuous at 15 (male) and 12 (female); at 18 the rounded adult constants
// step by −0.063 % (male, 77.149 → 77.1) and +0.12 % (female, 68.218 →
// 68.3). Scys must be IFCC-calibrated (ERM-DA471/IFCC); the reference code
// notes that a non-calibrated Siemens value is multiplied by 1.17, which is
// a calibration rule, not part of this equation.
//
// Age range [1, 25), as for the creatinine equation. Sex is needed: K
// depends on it.
//
// There is no equation-specific LOINC code; the policy's generic eGFR code
// (69405-9) is used.
func ckidU25Cys() Equation {
	return Equation{
		ID:       "ckid-u25-cys",
		Version:  "1",
		Name:     "CKiD U25 cystatin C",
		Citation: "Pierce CB et al. Kidney Int 2021;99:948-956",
		// No equation-specific LOINC code exists: the policy's generic
		// 69405-9 is used.
		LOINC:     "",
		LOINCName: "",
		Unit:      UnitIndexed,
		MinAge:    1,
		MaxAge:    25,
		Needs:     NeedCystatinC | NeedSex,
		Compute: func(in Inputs) (float64, []Step, error) {
			if in.Sex != SexFemale && in.Sex != SexMale {
				return 0, nil, errInput // the policy resolves unknown sex before calling
			}
			if !(in.CystatinCMgL > 0) || math.IsInf(in.CystatinCMgL, 0) ||
				!(in.AgeYears >= 0) || math.IsInf(in.AgeYears, 0) {
				return 0, nil, errInput
			}
			k, kFormula := ckidU25CysK(in.AgeYears, in.Sex)
			v := k / in.CystatinCMgL
			if math.IsNaN(v) || math.IsInf(v, 0) {
				return 0, nil, errInput
			}
			return v, []Step{
				step("K", k, "%s", kFormula),
				step("eGFR", v, "%.6g / %g mg/L", k, in.CystatinCMgL),
			}, nil
		},
	}
}

// ckidU25CysK returns the CKiD U25 cystatin C constant K for an age and sex,
// with the formula that produced it.
func ckidU25CysK(age float64, sex Sex) (float64, string) {
	base, pivot, child, teen, adult := 79.9, 12.0, 1.004, 0.974, 68.3
	if sex == SexMale {
		base, pivot, child, teen, adult = 87.2, 15.0, 1.011, 0.960, 77.1
	}
	switch {
	case age < pivot:
		return base * math.Pow(child, age-pivot), fmt.Sprintf("%g × %g^(%g − %g) (%s, age < %g)", base, child, age, pivot, sex, pivot)
	case age < 18:
		return base * math.Pow(teen, age-pivot), fmt.Sprintf("%g × %g^(%g − %g) (%s, %g ≤ age < 18)", base, teen, age, pivot, sex, pivot)
	default:
		return adult, fmt.Sprintf("%g (%s, age ≥ 18)", adult, sex)
	}
}
