package calc

import "math"

// ekfcCys is the European Kidney Function Consortium (EKFC) cystatin C
// equation, which uses neither sex nor race.
//
// Source: Pottel H, Björk J, Rule AD, et al. Cystatin C-based equation to
// estimate GFR without the inclusion of race and sex. N Engl J Med.
// 2023;388(4):333-343. doi:10.1056/NEJMoa2203769.
//
//	eGFR = 107.3 × (Scys/Q)^α × 0.990^(age − 40) [age > 40]
//	α = −0.322 when Scys/Q < 1, −1.132 when Scys/Q ≥ 1
//	Q = 0.83 mg/L below age 50; 0.83 + 0.005 × (age − 50) mg/L from 50
//
// It is the creatinine EKFC form (see ekfcCr) with the rescaling factor for
// cystatin C, which the paper estimated from 227,643 Swedish patients and
// found to depend on age only. Q is continuous at 50. Scys in mg/L,
// standardised to the IFCC reference material ERM-DA471/IFCC.
//
// Age range: the paper estimated Q "in adults" and validated the equation in
// adult cohorts, so the validated range starts at 18 with no upper bound.
// A later paper by the same group (Pottel H, Nyman U, Björk J, et al.
// Extending the cystatin C based EKFC-equation to children – validation
// results from Europe; abstract read in the Lund University and ULiège
// repositories, journal and year not confirmed here) keeps Q = 0.83 mg/L for
// children (bias −7.6 mL/min/1.73 m², P30 85.8 % in 2,293 European
// children). Lowering MinAge to 2 on that basis is left to a deliberate
// decision, not made here.
//
// There is no equation-specific LOINC code; the policy's generic eGFR code
// (69405-9) is used.
func ekfcCys() Equation {
	return Equation{
		ID:       "ekfc-cys",
		Version:  "1",
		Name:     "EKFC cystatin C",
		Citation: "Pottel H et al. N Engl J Med 2023;388:333-343",
		// No equation-specific LOINC code exists: the policy's generic
		// 69405-9 is used.
		LOINC:     "",
		LOINCName: "",
		Unit:      UnitIndexed,
		MinAge:    18,
		Needs:     NeedCystatinC,
		Compute: func(in Inputs) (float64, []Step, error) {
			if !(in.CystatinCMgL > 0) || math.IsInf(in.CystatinCMgL, 0) ||
				!(in.AgeYears >= 0) || math.IsInf(in.AgeYears, 0) {
				return 0, nil, errInput
			}
			q, qStep := ekfcCysQ(in.AgeYears)
			ratio := in.CystatinCMgL / q
			steps := []Step{
				qStep,
				step("Scys/Q", ratio, "%g mg/L / %.6g mg/L", in.CystatinCMgL, q),
			}
			v, formSteps := ekfcForm(ratio, in.AgeYears, "Scys/Q")
			if math.IsNaN(v) || math.IsInf(v, 0) {
				return 0, nil, errInput
			}
			return v, append(steps, formSteps...), nil
		},
	}
}

// ekfcCysQ returns the EKFC cystatin C rescaling factor Q in mg/L and the
// step that derives it.
func ekfcCysQ(age float64) (float64, Step) {
	if age < 50 {
		return 0.83, step("Q (mg/L)", 0.83, "0.83 (age %g < 50)", age)
	}
	q := 0.83 + 0.005*(age-50)
	return q, step("Q (mg/L)", q, "0.83 + 0.005 × (%g − 50)", age)
}
