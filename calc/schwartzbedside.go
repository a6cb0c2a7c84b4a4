package calc

import "math"

// schwartzBedside is the bedside Schwartz (CKiD 2009) creatinine equation
// for children.
//
// Source: Schwartz GJ, Muñoz A, Schneider MF, Mak RH, Kaskel F, Warady BA,
// Furth SL. New equations to estimate GFR in children with CKD. J Am Soc
// Nephrol. 2009;20(3):629-637. doi:10.1681/ASN.2008030287.
//
//	eGFR = 0.413 × height(cm) / Scr(mg/dL)
//
// The abstract presents 0.413 × (height/serum creatinine), height in cm, as
// the bedside approximation of its full CKiD equation, with creatinine
// measured by an enzymatic, IDMS-traceable method. It takes no sex and no
// age.
//
// Age range: the equation was derived from 349 CKiD children aged 1 to 16
// years with CKD. The range here is [1, 18): bedside Schwartz is the usual
// paediatric creatinine equation up to adulthood (common practice), and
// the policy chooses adult equations from 18. Laboratories wanting the
// derivation range only can narrow it in their policy.
//
// LOINC 50384-7 is "Glomerular filtration rate/1.73 sq M.predicted [Volume
// Rate/Area] in Serum, Plasma or Blood by Creatinine-based formula
// (Schwartz)" (checked against LOINC table extracts and a FHIR questionnaire
// using the code, not the LOINC site).
func schwartzBedside() Equation {
	return Equation{
		ID:        "schwartz-bedside",
		Version:   "1",
		Name:      "Bedside Schwartz (CKiD 2009)",
		Citation:  "Schwartz GJ et al. J Am Soc Nephrol 2009;20:629-637",
		LOINC:     "50384-7",
		LOINCName: "Glomerular filtration rate/1.73 sq M.predicted [Volume Rate/Area] in Serum, Plasma or Blood by Creatinine-based formula (Schwartz)",
		Unit:      UnitIndexed,
		MinAge:    1,
		MaxAge:    18,
		Needs:     NeedCreatinine | NeedHeight,
		Compute: func(in Inputs) (float64, []Step, error) {
			if !(in.CreatinineMgDL > 0) || math.IsInf(in.CreatinineMgDL, 0) ||
				!(in.HeightCM > 0) || math.IsInf(in.HeightCM, 0) {
				return 0, nil, errInput
			}
			ratio := in.HeightCM / in.CreatinineMgDL
			v := 0.413 * ratio
			if math.IsNaN(v) || math.IsInf(v, 0) {
				return 0, nil, errInput
			}
			return v, []Step{
				step("height/Scr", ratio, "%g cm / %g mg/dL", in.HeightCM, in.CreatinineMgDL),
				step("eGFR", v, "0.413 × %.6g", ratio),
			}, nil
		},
	}
}
