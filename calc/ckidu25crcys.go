package calc

import "math"

// ckidU25CrCys is the CKiD U25 creatinine–cystatin C estimate: the mean of
// the CKiD U25 creatinine and cystatin C equations.
//
// Source: Pierce CB, Muñoz A, Ng DK, Warady BA, Furth SL, Schwartz GJ. Age-
// and sex-dependent clinical equations to estimate glomerular filtration
// rates in children and young adults with chronic kidney disease. Kidney Int.
// 2021;99(4):948-956. doi:10.1016/j.kint.2020.10.047. The study's published
// reference code (R, SAS and Stata) defines the combined value as
// eGFRU25ave = (eGFRU25scr + eGFRU25cys) / 2.
//
//	eGFR = (K_cr × height(m)/Scr + K_cys/Scys) / 2
//
// Both component equations are computed exactly as ckidU25Cr and ckidU25Cys
// and their steps are listed, prefixed "cr:" and "cys:". Age range 1 to
// under 25 years, as for the components.
//
// There is no equation-specific LOINC code; the policy's generic eGFR code
// (69405-9) is used.
func ckidU25CrCys() Equation {
	cr, cys := ckidU25Cr(), ckidU25Cys()
	return Equation{
		ID:       "ckid-u25-crcys",
		Version:  "1",
		Name:     "CKiD U25 creatinine–cystatin C (mean)",
		Citation: "Pierce CB et al. Kidney Int 2021;99:948-956",
		// No equation-specific LOINC code exists: the policy's generic
		// 69405-9 is used.
		LOINC:     "",
		LOINCName: "",
		Unit:      UnitIndexed,
		MinAge:    math.Max(cr.MinAge, cys.MinAge),
		MaxAge:    math.Min(cr.MaxAge, cys.MaxAge),
		Needs:     cr.Needs | cys.Needs,
		Compute: func(in Inputs) (float64, []Step, error) {
			return meanCrCys(in, "CKiD U25", cr.Compute, cys.Compute)
		},
	}
}

// meanCrCys computes the arithmetic mean of a creatinine and a cystatin C
// equation of one family, keeping every step of both (prefixed "cr:" and
// "cys:") so that the audit trail shows each component.
func meanCrCys(in Inputs, family string, cr, cys func(Inputs) (float64, []Step, error)) (float64, []Step, error) {
	vCr, sCr, err := cr(in)
	if err != nil {
		return 0, nil, err
	}
	vCys, sCys, err := cys(in)
	if err != nil {
		return 0, nil, err
	}
	steps := make([]Step, 0, len(sCr)+len(sCys)+3)
	for _, s := range sCr {
		s.Name = "cr: " + s.Name
		steps = append(steps, s)
	}
	for _, s := range sCys {
		s.Name = "cys: " + s.Name
		steps = append(steps, s)
	}
	v := (vCr + vCys) / 2
	steps = append(steps,
		step("eGFRcr", vCr, "%s creatinine (cr: eGFR)", family),
		step("eGFRcys", vCys, "%s cystatin C (cys: eGFR)", family),
		step("eGFR", v, "(%.6g + %.6g) / 2", vCr, vCys),
	)
	return v, steps, nil
}
