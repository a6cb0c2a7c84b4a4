package calc

import (
	"fmt"
	"math"
)

// ekfcCr is the European Kidney Function Consortium (EKFC) creatinine
// equation.
//
// Source: Pottel H, Björk J, Courbebaisse M, et al. Development and
// validation of a modified full age spectrum creatinine-based equation to
// estimate glomerular filtration rate: a cross-sectional analysis of pooled
// data. Ann Intern Med. 2021;174(2):183-191. doi:10.7326/M20-4366.
//
//	eGFR = 107.3 × (Scr/Q)^α × 0.990^(age − 40) [age > 40]
//	α = −0.322 when Scr/Q < 1, −1.132 when Scr/Q ≥ 1
//	Q (µmol/L), age 2–25 years:
//	  male:   ln Q = 3.200 + 0.259·age − 0.543·ln(age) − 0.00763·age² + 0.0000790·age³
//	  female: ln Q = 3.080 + 0.177·age − 0.223·ln(age) − 0.00596·age² + 0.0000686·age³
//	Q, age > 25 years: 80 µmol/L (male), 62 µmol/L (female)
//
// Unit choice: the arithmetic is done in µmol/L, the paper's primary unit.
// The age polynomial yields Q in µmol/L, and the adult values are printed as
// 80 and 62 µmol/L with 0.90 and 0.70 mg/dL in parentheses; those are
// rounded conversions (80/88.4 = 0.905, 62/88.4 = 0.701), so computing in
// mg/dL with 0.90/0.70 would shift adult results by up to about 0.6 % and
// change the size of the step in Q at age 25. Creatinine arrives in mg/dL and
// is converted with CreatinineMgDLToUmolL (88.4, the factor the paper
// prints); a result received in µmol/L was divided by the same factor, so the
// round trip is exact up to floating-point rounding.
//
// The age polynomial applies up to and including age 25 (as in the published
// SAS and R implementations that were checked: the kidney.epi R package and
// the ARK study code); from just above 25 the adult constant applies. The
// published Q is not continuous there: at age 25 the polynomial gives
// 80.86 µmol/L (male) and 62.43 µmol/L (female), 1.1 % and 0.7 % above the
// adult values. The equation was developed and validated from age 2 to 100;
// no upper bound is imposed here (the policy may impose one).
//
// Q above is for White European populations, the paper's default. There is
// no equation-specific LOINC code; the policy's generic eGFR code
// (69405-9) is used.
func ekfcCr() Equation {
	return Equation{
		ID:       "ekfc-cr",
		Version:  "1",
		Name:     "EKFC creatinine",
		Citation: "Pottel H et al. Ann Intern Med 2021;174:183-191",
		// No equation-specific LOINC code exists: the policy's generic
		// 69405-9 is used.
		LOINC:     "",
		LOINCName: "",
		Unit:      UnitIndexed,
		MinAge:    2,
		Needs:     NeedCreatinine | NeedSex,
		Compute: func(in Inputs) (float64, []Step, error) {
			if in.Sex != SexFemale && in.Sex != SexMale {
				return 0, nil, errInput // the policy resolves unknown sex before calling
			}
			if !(in.CreatinineMgDL > 0) || math.IsInf(in.CreatinineMgDL, 0) ||
				!(in.AgeYears > 0) || math.IsInf(in.AgeYears, 0) {
				return 0, nil, errInput
			}
			scr := in.CreatinineMgDL * CreatinineMgDLToUmolL
			steps := []Step{step("Scr (µmol/L)", scr, "%g mg/dL × %g", in.CreatinineMgDL, CreatinineMgDLToUmolL)}
			q, qSteps := ekfcCrQ(in.AgeYears, in.Sex)
			steps = append(steps, qSteps...)
			ratio := scr / q
			steps = append(steps, step("Scr/Q", ratio, "%.6g µmol/L / %.6g µmol/L", scr, q))
			v, formSteps := ekfcForm(ratio, in.AgeYears, "Scr/Q")
			if math.IsNaN(v) || math.IsInf(v, 0) {
				return 0, nil, errInput
			}
			return v, append(steps, formSteps...), nil
		},
	}
}

// ekfcCrQ returns the EKFC creatinine rescaling factor Q in µmol/L and the
// steps that derive it.
func ekfcCrQ(age float64, sex Sex) (float64, []Step) {
	if age > 25 {
		q := 62.0
		if sex == SexMale {
			q = 80.0
		}
		return q, []Step{step("Q (µmol/L)", q, "%g (%s, age > 25)", q, sex)}
	}
	// The coefficients are printed in steps as the paper prints them.
	a, b, c, d, e := 3.080, 0.177, 0.223, 0.00596, 0.0000686
	text := "3.080 + 0.177×%[1]g − 0.223×ln(%[1]g) − 0.00596×%[1]g² + 0.0000686×%[1]g³ (%[2]s, age ≤ 25)"
	if sex == SexMale {
		a, b, c, d, e = 3.200, 0.259, 0.543, 0.00763, 0.0000790
		text = "3.200 + 0.259×%[1]g − 0.543×ln(%[1]g) − 0.00763×%[1]g² + 0.0000790×%[1]g³ (%[2]s, age ≤ 25)"
	}
	lnQ := a + b*age - c*math.Log(age) - d*age*age + e*age*age*age
	q := math.Exp(lnQ)
	return q, []Step{
		step("ln Q", lnQ, text, age, sex),
		step("Q (µmol/L)", q, "exp(%.6g)", lnQ),
	}
}

// ekfcForm is the shared EKFC form 107.3 × (marker/Q)^α × age factor, used by
// the creatinine and cystatin C equations. label names the ratio in steps.
func ekfcForm(ratio, age float64, label string) (float64, []Step) {
	alpha := -1.132
	if ratio < 1 {
		alpha = -0.322
	}
	term := math.Pow(ratio, alpha)
	ageFactor, ageFormula := 1.0, fmt.Sprintf("1 (age %g ≤ 40)", age)
	if age > 40 {
		ageFactor = math.Pow(0.990, age-40)
		ageFormula = fmt.Sprintf("0.990^(%g − 40)", age)
	}
	v := 107.3 * term * ageFactor
	return v, []Step{
		step("("+label+")^α", term, "%.6g^%g", ratio, alpha),
		step("age factor", ageFactor, "%s", ageFormula),
		step("eGFR", v, "107.3 × %.6g × %.6g", term, ageFactor),
	}
}
