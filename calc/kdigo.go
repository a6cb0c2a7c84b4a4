package calc

// Category returns the KDIGO GFR category for an indexed GFR in
// mL/min/1.73 m²: G1 ≥90, G2 60–89, G3a 45–59, G3b 30–44, G4 15–29, G5 <15.
//
// Source: KDIGO 2012 Clinical Practice Guideline for the Evaluation and
// Management of Chronic Kidney Disease, Kidney Int Suppl 2013;3:1-150,
// Table 5 (unchanged in the KDIGO 2024 CKD guideline). The category is taken
// from the value as reported (after rounding) so that the printed number and
// the printed category never disagree.
func Category(gfr float64) string {
	switch {
	case gfr >= 90:
		return "G1"
	case gfr >= 60:
		return "G2"
	case gfr >= 45:
		return "G3a"
	case gfr >= 30:
		return "G3b"
	case gfr >= 15:
		return "G4"
	default:
		return "G5"
	}
}

// CategoryDescription is the KDIGO term for a category (same source).
func CategoryDescription(cat string) string {
	switch cat {
	case "G1":
		return "normal or high"
	case "G2":
		return "mildly decreased"
	case "G3a":
		return "mildly to moderately decreased"
	case "G3b":
		return "moderately to severely decreased"
	case "G4":
		return "severely decreased"
	case "G5":
		return "kidney failure"
	default:
		return ""
	}
}
