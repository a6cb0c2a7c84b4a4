package calc

import "math"

// ckdEPI2021CrCys is the race-free CKD-EPI 2021 creatinine–cystatin C
// equation.
//
// Source: Inker LA, Eneanya ND, Coresh J, et al. New creatinine- and cystatin
// C-based equations to estimate GFR without race. N Engl J Med.
// 2021;385(19):1737-1749. doi:10.1056/NEJMoa2102953.
//
//	eGFR = 135 × min(Scr/κ, 1)^α × max(Scr/κ, 1)^−0.544
//	           × min(Scys/0.8, 1)^−0.323 × max(Scys/0.8, 1)^−0.778
//	           × 0.9961^age × 0.963 [female]
//	κ = 0.7 (female), 0.9 (male); α = −0.219 (female), −0.144 (male)
//
// Scr in mg/dL (standardised, IDMS-traceable), Scys in mg/L (standardised to
// the IFCC reference material ERM-DA471/IFCC); validated from age 18.
// Coefficients cross-checked against the R packages nephro
// (CKDEpi_RF.creat.cys) and kidney.epi (egfr.ckdepi.cr_cys.2021).
func ckdEPI2021CrCys() Equation {
	return Equation{
		ID:        "ckd-epi-2021-crcys",
		Version:   "1",
		Name:      "CKD-EPI 2021 creatinine–cystatin C",
		Citation:  "Inker LA et al. N Engl J Med 2021;385:1737-49",
		LOINC:     "98980-6",
		LOINCName: "Glomerular filtration rate/1.73 sq M.predicted [Volume Rate/Area] in Serum, Plasma or Blood by Creatinine and Cystatin C-based formula (CKD-EPI 2021)",
		Unit:      UnitIndexed,
		MinAge:    18,
		Needs:     NeedCreatinine | NeedCystatinC | NeedSex,
		Compute: func(in Inputs) (float64, []Step, error) {
			// Compute is only called with its Needs present, but a wrong
			// value is worse than none: refuse rather than guess.
			if (in.Sex != SexFemale && in.Sex != SexMale) ||
				!(in.CreatinineMgDL > 0) || !(in.CystatinCMgL > 0) || !(in.AgeYears > 0) {
				return 0, nil, errInput
			}
			kappa, alpha, sexFactor := 0.9, -0.144, 1.0
			if in.Sex == SexFemale {
				kappa, alpha, sexFactor = 0.7, -0.219, 0.963
			}
			crRatio := in.CreatinineMgDL / kappa
			crLo := math.Pow(math.Min(crRatio, 1), alpha)
			crHi := math.Pow(math.Max(crRatio, 1), -0.544)
			cysRatio := in.CystatinCMgL / 0.8
			cysLo := math.Pow(math.Min(cysRatio, 1), -0.323)
			cysHi := math.Pow(math.Max(cysRatio, 1), -0.778)
			age := math.Pow(0.9961, in.AgeYears)
			v := 135 * crLo * crHi * cysLo * cysHi * age * sexFactor
			return v, []Step{
				step("Scr/κ", crRatio, "%g mg/dL / %g", in.CreatinineMgDL, kappa),
				step("min(Scr/κ,1)^α", crLo, "min(%.6g,1)^%g", crRatio, alpha),
				step("max(Scr/κ,1)^−0.544", crHi, "max(%.6g,1)^-0.544", crRatio),
				step("Scys/0.8", cysRatio, "%g mg/L / 0.8", in.CystatinCMgL),
				step("min(Scys/0.8,1)^−0.323", cysLo, "min(%.6g,1)^-0.323", cysRatio),
				step("max(Scys/0.8,1)^−0.778", cysHi, "max(%.6g,1)^-0.778", cysRatio),
				step("0.9961^age", age, "0.9961^%g", in.AgeYears),
				step("sex factor", sexFactor, "%g (%s)", sexFactor, in.Sex),
				step("eGFR", v, "135 × %.6g × %.6g × %.6g × %.6g × %.6g × %g", crLo, crHi, cysLo, cysHi, age, sexFactor),
			}, nil
		},
	}
}
