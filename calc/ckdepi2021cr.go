package calc

import "math"

// ckdEPI2021Cr is the race-free CKD-EPI 2021 creatinine equation.
//
// Source: Inker LA, Eneanya ND, Coresh J, et al. New creatinine- and cystatin
// C-based equations to estimate GFR without race. N Engl J Med.
// 2021;385(19):1737-1749. doi:10.1056/NEJMoa2102953.
//
//	eGFR = 142 × min(Scr/κ, 1)^α × max(Scr/κ, 1)^−1.200 × 0.9938^age × 1.012 [female]
//	κ = 0.7 (female), 0.9 (male); α = −0.241 (female), −0.302 (male)
//
// Scr in mg/dL (standardised, IDMS-traceable); validated from age 18.
func ckdEPI2021Cr() Equation {
	return Equation{
		ID:        "ckd-epi-2021-cr",
		Version:   "1",
		Name:      "CKD-EPI 2021 creatinine",
		Citation:  "Inker LA et al. N Engl J Med 2021;385:1737-49",
		LOINC:     "98979-8",
		LOINCName: "Glomerular filtration rate/1.73 sq M.predicted [Volume Rate/Area] in Serum, Plasma or Blood by Creatinine-based formula (CKD-EPI 2021)",
		Unit:      UnitIndexed,
		MinAge:    18,
		Needs:     NeedCreatinine | NeedSex,
		Compute: func(in Inputs) (float64, []Step, error) {
			// Compute is only called with its Needs present, but a wrong
			// value is worse than none: refuse rather than guess.
			if (in.Sex != SexFemale && in.Sex != SexMale) || !(in.CreatinineMgDL > 0) || !(in.AgeYears > 0) {
				return 0, nil, errInput
			}
			kappa, alpha, sexFactor := 0.9, -0.302, 1.0
			if in.Sex == SexFemale {
				kappa, alpha, sexFactor = 0.7, -0.241, 1.012
			}
			ratio := in.CreatinineMgDL / kappa
			lo := math.Pow(math.Min(ratio, 1), alpha)
			hi := math.Pow(math.Max(ratio, 1), -1.200)
			age := math.Pow(0.9938, in.AgeYears)
			v := 142 * lo * hi * age * sexFactor
			return v, []Step{
				step("Scr/κ", ratio, "%g mg/dL / %g", in.CreatinineMgDL, kappa),
				step("min(Scr/κ,1)^α", lo, "min(%.6g,1)^%g", ratio, alpha),
				step("max(Scr/κ,1)^−1.200", hi, "max(%.6g,1)^-1.200", ratio),
				step("0.9938^age", age, "0.9938^%g", in.AgeYears),
				step("sex factor", sexFactor, "%g (%s)", sexFactor, in.Sex),
				step("eGFR", v, "142 × %.6g × %.6g × %.6g × %g", lo, hi, age, sexFactor),
			}, nil
		},
	}
}
