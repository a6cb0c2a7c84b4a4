package calc

import "math"

// ekfcCrCys is the EKFC creatinine–cystatin C estimate: the arithmetic mean
// of the EKFC creatinine and EKFC cystatin C equations.
//
// Source: Pottel H, Björk J, Rule AD, et al. Cystatin C-based equation to
// estimate GFR without the inclusion of race and sex. N Engl J Med.
// 2023;388(4):333-343. doi:10.1056/NEJMoa2203769, which reports that the
// arithmetic mean of EKFC eGFRcr and EKFC eGFRcys estimates measured GFR more
// accurately than either alone. The paper's text was not read directly: the
// definition as the arithmetic mean is confirmed by a public R script that
// quotes the paper (PubMed 36720134) and implements it as such, by the EKFC
// group's paediatric extension (Pottel H, Nyman U, Björk J, et al., abstract:
// "the arithmetic mean of the EKFCCrea and EKFCCysC"), and by Chen Y et al.
// (assessment of the 2023 EKFC equations in Chinese adults), who name it
// EKFCCr-Cys.
//
//	eGFR = (eGFR_EKFC-cr + eGFR_EKFC-cys) / 2
//
// Both component equations are computed exactly as ekfcCr and ekfcCys (the
// creatinine one in µmol/L) and their steps are listed, prefixed "cr:" and
// "cys:". The validated age range is that of the cystatin C equation (from
// 18); sex is needed by the creatinine part.
//
// There is no equation-specific LOINC code; the policy's generic eGFR code
// (69405-9) is used.
func ekfcCrCys() Equation {
	cr, cys := ekfcCr(), ekfcCys()
	return Equation{
		ID:       "ekfc-crcys",
		Version:  "1",
		Name:     "EKFC creatinine–cystatin C (mean)",
		Citation: "Pottel H et al. N Engl J Med 2023;388:333-343; Ann Intern Med 2021;174:183-191",
		// No equation-specific LOINC code exists: the policy's generic
		// 69405-9 is used.
		LOINC:     "",
		LOINCName: "",
		Unit:      UnitIndexed,
		MinAge:    math.Max(cr.MinAge, cys.MinAge),
		Needs:     cr.Needs | cys.Needs,
		Compute: func(in Inputs) (float64, []Step, error) {
			return meanCrCys(in, "EKFC", cr.Compute, cys.Compute)
		},
	}
}
