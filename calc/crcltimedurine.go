package calc

import "math"

// crclTimedUrine is the creatinine clearance measured from a timed urine
// collection.
//
// Source: the renal clearance definition as given in the kidney function
// chapter of Tietz Textbook of Clinical Chemistry and Molecular Diagnostics,
// 6th ed. (Rifai N, Horvath AR, Wittwer CT, eds.; Elsevier, 2018); edition,
// editors and chapter from memory.
//
//	CrCl = U × V / (P × t)
//
// U urine creatinine in mg/dL, V urine volume in mL, P plasma (serum)
// creatinine in mg/dL, t collection time in min; the result is in mL/min, not
// indexed to body surface area. U and P need only share a unit, so the
// mg/dL/µmol/L factor cancels. Valid at any age; it depends on a complete,
// accurately timed collection and a steady plasma creatinine.
//
// LOINC 2164-2 is "Creatinine renal clearance in 24 hour Urine and Serum or
// Plasma" (checked against LOINC table extracts, not the LOINC site): it
// names a 24-hour collection, so a laboratory that reports shorter
// collections should set its own output code in the policy.
func crclTimedUrine() Equation {
	return Equation{
		ID:        "crcl-timed-urine",
		Version:   "1",
		Name:      "Creatinine clearance, timed urine collection",
		Citation:  "Tietz Textbook of Clinical Chemistry and Molecular Diagnostics, 6th ed., 2018: renal clearance U×V/(P×t)",
		LOINC:     "2164-2",
		LOINCName: "Creatinine renal clearance in 24 hour Urine and Serum or Plasma",
		Unit:      UnitNotIndexed,
		MinAge:    0,
		Needs:     NeedCreatinine | NeedTimedUrine,
		Compute: func(in Inputs) (float64, []Step, error) {
			u, vol, p, t := in.UrineCreatinineMgDL, in.UrineVolumeML, in.CreatinineMgDL, in.CollectionMin
			if !(u > 0) || !(vol > 0) || !(p > 0) || !(t > 0) {
				return 0, nil, errInput
			}
			flow := vol / t
			ratio := u / p
			v := u * vol / (p * t)
			if math.IsNaN(v) || math.IsInf(v, 0) {
				return 0, nil, errInput
			}
			return v, []Step{
				step("urine flow V/t", flow, "%g mL / %g min", vol, t),
				step("U/P", ratio, "%g mg/dL / %g mg/dL", u, p),
				step("CrCl", v, "%g × %g / (%g × %g)", u, vol, p, t),
			}, nil
		},
	}
}
