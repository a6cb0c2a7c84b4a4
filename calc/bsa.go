package calc

import (
	"errors"
	"fmt"
	"math"
)

// ReferenceBSA is the conventional reference body surface area, 1.73 m², to
// which GFR is indexed ("mL/min/1.73 m²"). It is a convention (an average
// adult surface area in the early clearance studies; from memory), not a
// property of the patient.
const ReferenceBSA = 1.73

// BSAMethod names a body-surface-area formula.
type BSAMethod string

// Body-surface-area formulas.
const (
	BSAMethodDuBois    BSAMethod = "dubois"    // see BSADuBois
	BSAMethodMosteller BSAMethod = "mosteller" // see BSAMosteller
)

// BSADuBois returns the body surface area in m² by the DuBois formula:
//
//	BSA = 0.007184 × W^0.425 × H^0.725
//
// with height H in cm and weight W in kg. Source: Du Bois D, Du Bois EF.
// A formula to estimate the approximate surface area if height and weight be
// known. Arch Intern Med. 1916;17(6):863-871.
// doi:10.1001/archinte.1916.00080130010002.
//
// It does not check its inputs; use [BSA] for checked input.
func BSADuBois(heightCM, weightKG float64) float64 {
	return 0.007184 * math.Pow(weightKG, 0.425) * math.Pow(heightCM, 0.725)
}

// BSAMosteller returns the body surface area in m² by the Mosteller formula:
//
//	BSA = √(H × W / 3600)
//
// with height H in cm and weight W in kg. Source: Mosteller RD. Simplified
// calculation of body-surface area. N Engl J Med. 1987;317(17):1098.
// doi:10.1056/NEJM198710223171717.
//
// It does not check its inputs; use [BSA] for checked input.
func BSAMosteller(heightCM, weightKG float64) float64 {
	return math.Sqrt(heightCM * weightKG / 3600)
}

// errBSAInput reports a height or weight BSA cannot use. It carries no value:
// patient data never goes into an error string.
var errBSAInput = errors.New("calc: body surface area needs a positive, finite height and weight")

// BSA returns the body surface area in m² by the named method. It refuses an
// unknown method and a height or weight that is not positive and finite.
func BSA(method BSAMethod, heightCM, weightKG float64) (float64, error) {
	var f func(float64, float64) float64
	switch method {
	case BSAMethodDuBois:
		f = BSADuBois
	case BSAMethodMosteller:
		f = BSAMosteller
	default:
		return 0, fmt.Errorf("calc: unknown body surface area method %q", string(method))
	}
	if !(heightCM > 0) || !(weightKG > 0) || math.IsInf(heightCM, 0) || math.IsInf(weightKG, 0) {
		return 0, errBSAInput
	}
	v := f(heightCM, weightKG)
	if !(v > 0) || math.IsInf(v, 0) {
		return 0, errBSAInput
	}
	return v, nil
}

// Deindex converts a GFR indexed to [ReferenceBSA] (mL/min/1.73 m²) into the
// patient's absolute value in mL/min, for a body surface area bsa in m²:
// indexed × bsa / 1.73.
func Deindex(indexed, bsa float64) float64 { return indexed * bsa / ReferenceBSA }

// Index converts an absolute clearance in mL/min into a value indexed to
// [ReferenceBSA] (mL/min/1.73 m²), for a body surface area bsa in m²:
// perMin × 1.73 / bsa.
func Index(perMin, bsa float64) float64 { return perMin * ReferenceBSA / bsa }
