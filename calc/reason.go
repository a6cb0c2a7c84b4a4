package calc

// Reason is a stable, machine-readable refusal code. Codes never change
// meaning once released; new ones may be added.
type Reason string

// Refusal reasons.
const (
	ReasonUnitUnknown          Reason = "unit-unknown"
	ReasonValueCensored        Reason = "value-censored"
	ReasonValueNotNumeric      Reason = "value-not-numeric"
	ReasonValueImplausible     Reason = "value-implausible"
	ReasonInputMissing         Reason = "input-missing"
	ReasonInputDuplicate       Reason = "input-duplicate"
	ReasonHeightMissing        Reason = "height-missing"
	ReasonAgeMissing           Reason = "age-missing"
	ReasonAgeBelowRange        Reason = "age-below-range"
	ReasonAgeAboveRange        Reason = "age-above-range"
	ReasonSexUnknown           Reason = "sex-unknown"
	ReasonNotTraceable         Reason = "assay-not-traceable"
	ReasonCalibrationAmbiguous Reason = "calibration-ambiguous"
	ReasonEquationUnknown      Reason = "equation-unknown"
	ReasonNoEquation           Reason = "no-equation"
	ReasonComputation          Reason = "computation-failed"
)

// Describe returns a plain-language sentence for a reason code, suitable for a
// report comment. It never contains patient data.
func (r Reason) Describe() string {
	switch r {
	case ReasonUnitUnknown:
		return "eGFR not calculated: the result's unit is not recognised."
	case ReasonValueCensored:
		return "eGFR not calculated: the result is outside the measuring range (reported with < or >)."
	case ReasonValueNotNumeric:
		return "eGFR not calculated: the result is not a number."
	case ReasonValueImplausible:
		return "eGFR not calculated: the result is outside the plausible range for its unit."
	case ReasonInputMissing:
		return "eGFR not calculated: a required result is missing."
	case ReasonInputDuplicate:
		return "eGFR not calculated: the same analyte was reported more than once."
	case ReasonHeightMissing:
		return "eGFR not calculated: height is required for this age and was not provided."
	case ReasonAgeMissing:
		return "eGFR not calculated: date of birth or collection time is missing."
	case ReasonAgeBelowRange:
		return "eGFR not calculated: the patient is younger than the equation's validated age range."
	case ReasonAgeAboveRange:
		return "eGFR not calculated: the patient is older than the equation's validated age range."
	case ReasonSexUnknown:
		return "eGFR not calculated: sex is not recorded as female or male."
	case ReasonNotTraceable:
		return "eGFR not calculated: the assay is not traceable to the reference method."
	case ReasonCalibrationAmbiguous:
		return "eGFR not calculated: more than one calibration rule matches the assay."
	case ReasonEquationUnknown:
		return "eGFR not calculated: the requested equation is not known."
	case ReasonNoEquation:
		return "eGFR not calculated: no equation in the policy applies to these results."
	case ReasonComputation:
		return "eGFR not calculated: the calculation could not be completed."
	default:
		return "eGFR not calculated."
	}
}

// Reasons lists every refusal code, for metrics created up front.
func Reasons() []Reason {
	return []Reason{
		ReasonUnitUnknown, ReasonValueCensored, ReasonValueNotNumeric, ReasonValueImplausible,
		ReasonInputMissing, ReasonInputDuplicate, ReasonHeightMissing, ReasonAgeMissing,
		ReasonAgeBelowRange, ReasonAgeAboveRange, ReasonSexUnknown, ReasonNotTraceable,
		ReasonCalibrationAmbiguous, ReasonEquationUnknown, ReasonNoEquation, ReasonComputation,
	}
}
