package calc

import "time"

// Age is a patient's age at specimen collection.
type Age struct {
	Completed int     // completed years, by calendar date
	Decimal   float64 // completed years plus the elapsed fraction of the current year of life
}

// AgeAt computes age from a date of birth and a collection time. Only the
// calendar dates count: the birth date's year, month and day as given, and the
// collection time's date in its own location. It returns ok false when either
// is zero or collection precedes birth.
//
// A birthday on 29 February is reached on 1 March in common years (the
// month/day comparison below); common practice, it only moves the anniversary
// by one day.
func AgeAt(birth, collected time.Time) (Age, bool) {
	if birth.IsZero() || collected.IsZero() {
		return Age{}, false
	}
	by, bm, bd := birth.Date()
	cy, cm, cd := collected.Date()
	b := time.Date(by, bm, bd, 0, 0, 0, 0, time.UTC)
	c := time.Date(cy, cm, cd, 0, 0, 0, 0, time.UTC)
	if c.Before(b) {
		return Age{}, false
	}
	years := cy - by
	if cm < bm || (cm == bm && cd < bd) {
		years--
	}
	last := anniversary(b, years)
	next := anniversary(b, years+1)
	frac := float64(c.Sub(last)/(24*time.Hour)) / float64(next.Sub(last)/(24*time.Hour))
	return Age{Completed: years, Decimal: float64(years) + frac}, true
}

// anniversary returns the n-th birthday; 29 February falls on 1 March in
// common years (time.Date normalises 29 Feb to 1 Mar).
func anniversary(birth time.Time, n int) time.Time {
	return time.Date(birth.Year()+n, birth.Month(), birth.Day(), 0, 0, 0, 0, time.UTC)
}
