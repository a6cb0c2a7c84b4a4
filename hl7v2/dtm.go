package hl7v2

import (
	"errors"
	"time"
)

// Precision is how much of a DTM value was given.
type Precision int

// Precisions, from coarsest to finest.
const (
	PrecisionNone Precision = iota
	PrecisionYear
	PrecisionMonth
	PrecisionDay
	PrecisionHour
	PrecisionMinute
	PrecisionSecond
	PrecisionFraction // seconds with a decimal fraction
)

// String returns the name of the precision, e.g. "day".
func (p Precision) String() string {
	switch p {
	case PrecisionYear:
		return "year"
	case PrecisionMonth:
		return "month"
	case PrecisionDay:
		return "day"
	case PrecisionHour:
		return "hour"
	case PrecisionMinute:
		return "minute"
	case PrecisionSecond:
		return "second"
	case PrecisionFraction:
		return "fraction"
	default:
		return "none"
	}
}

// DTM is a parsed HL7 date/time value.
type DTM struct {
	// Time is the instant; parts not given are at their minimum (January,
	// the 1st, midnight).
	Time time.Time
	// Precision is the finest part given.
	Precision Precision
	// HasOffset reports whether the value carried its own UTC offset; when
	// not, Time is in the location given to ParseDTM.
	HasOffset bool
}

// IsZero reports whether no value was parsed.
func (d DTM) IsZero() bool { return d.Precision == PrecisionNone }

// ErrDTM is returned for text that is not an HL7 date/time. Its message never
// contains the text, which may be a date of birth.
var ErrDTM = errors.New("hl7v2: invalid date/time")

// ParseDTM parses the DTM format of HL7 v2.5.1 chapter 2, section 2.A.22:
//
//	YYYY[MM[DD[HH[MM[SS[.S[S[S[S]]]]]]]]][+/-ZZZZ]
//
// Up to nine fraction digits are accepted. A value without an offset is
// taken as local time in loc (UTC when loc is nil). Empty text gives the zero
// DTM and no error.
func ParseDTM(s string, loc *time.Location) (DTM, error) {
	if s == "" {
		return DTM{}, nil
	}
	if loc == nil {
		loc = time.UTC
	}
	// Split off the offset.
	body, off := s, ""
	for i := 0; i < len(s); i++ {
		if s[i] == '+' || s[i] == '-' {
			body, off = s[:i], s[i:]
			break
		}
	}
	digits, frac := body, ""
	for i := 0; i < len(body); i++ {
		if body[i] == '.' {
			digits, frac = body[:i], body[i+1:]
			break
		}
	}
	if !allDigits(digits) || !allDigits(frac) {
		return DTM{}, ErrDTM
	}
	var p Precision
	switch len(digits) {
	case 4:
		p = PrecisionYear
	case 6:
		p = PrecisionMonth
	case 8:
		p = PrecisionDay
	case 10:
		p = PrecisionHour
	case 12:
		p = PrecisionMinute
	case 14:
		p = PrecisionSecond
	default:
		return DTM{}, ErrDTM
	}
	if body != digits { // a '.' was present
		if p != PrecisionSecond || len(frac) == 0 || len(frac) > 9 {
			return DTM{}, ErrDTM
		}
		p = PrecisionFraction
	}
	num := func(from, to, def int) int {
		if to > len(digits) {
			return def
		}
		return atoi(digits[from:to])
	}
	year, month, day := num(0, 4, 0), num(4, 6, 1), num(6, 8, 1)
	hour, minute, sec := num(8, 10, 0), num(10, 12, 0), num(12, 14, 0)
	nsec := 0
	if frac != "" {
		nsec = atoi(frac)
		for k := len(frac); k < 9; k++ {
			nsec *= 10
		}
	}
	if month < 1 || month > 12 || day < 1 || day > 31 || hour > 23 || minute > 59 || sec > 59 {
		return DTM{}, ErrDTM
	}
	has := false
	if off != "" {
		if len(off) != 5 || !allDigits(off[1:]) {
			return DTM{}, ErrDTM
		}
		oh, om := atoi(off[1:3]), atoi(off[3:5])
		if oh > 23 || om > 59 {
			return DTM{}, ErrDTM
		}
		secs := oh*3600 + om*60
		if off[0] == '-' {
			secs = -secs
		}
		loc = time.FixedZone("", secs)
		has = true
	}
	t := time.Date(year, time.Month(month), day, hour, minute, sec, nsec, loc)
	if t.Day() != day || int(t.Month()) != month { // e.g. 31 April
		return DTM{}, ErrDTM
	}
	return DTM{Time: t, Precision: p, HasOffset: has}, nil
}

// FormatDTM writes t in the DTM format to second precision with its UTC
// offset, e.g. "20250314093000+0100".
func FormatDTM(t time.Time) string {
	return t.Format("20060102150405-0700")
}

func allDigits(s string) bool {
	for i := 0; i < len(s); i++ {
		if s[i] < '0' || s[i] > '9' {
			return false
		}
	}
	return true
}

func atoi(s string) int {
	n := 0
	for i := 0; i < len(s); i++ {
		n = n*10 + int(s[i]-'0')
	}
	return n
}
