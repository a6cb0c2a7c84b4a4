package fhir

import (
	"strconv"
	"strings"
	"time"

	cpb "github.com/google/fhir/go/proto/google/fhir/proto/r4/core/codes_go_proto"
	dpb "github.com/google/fhir/go/proto/google/fhir/proto/r4/core/datatypes_go_proto"
	"google.golang.org/protobuf/proto"
)

// Code systems and URIs used in the output (see the package documentation).
const (
	SystemLOINC       = "http://loinc.org"
	SystemUCUM        = "http://unitsofmeasure.org"
	SystemObsCategory = "http://terminology.hl7.org/CodeSystem/observation-category"
	SystemProvAgent   = "http://terminology.hl7.org/CodeSystem/provenance-participant-type"

	SystemEquation    = "urn:filtrate:equation"
	SystemPolicy      = "urn:filtrate:policy"
	SystemRefusal     = "urn:filtrate:refusal"
	SystemAuditRecord = "urn:filtrate:audit-record"
	SystemMessage     = "urn:filtrate:message"

	ExtEquation    = "urn:filtrate:fhir:equation"
	ExtPolicy      = "urn:filtrate:fhir:policy"
	ExtConfigHash  = "urn:filtrate:fhir:config-hash"
	ExtSoftware    = "urn:filtrate:fhir:software"
	ExtMessageID   = "urn:filtrate:fhir:message-id"
	ExtAuditRecord = "urn:filtrate:fhir:audit-record"
)

// MediaType is the FHIR JSON media type (FHIR R4, http.html#mime-type).
const MediaType = "application/fhir+json"

func str(s string) *dpb.String { return &dpb.String{Value: s} }

func uri(s string) *dpb.Uri { return &dpb.Uri{Value: s} }

func code(s string) *dpb.Code { return &dpb.Code{Value: s} }

func markdown(s string) *dpb.Markdown { return &dpb.Markdown{Value: s} }

func coding(system, c, display string) *dpb.Coding {
	cd := &dpb.Coding{System: uri(system), Code: code(c)}
	if display != "" {
		cd.Display = str(display)
	}
	return cd
}

func concept(text string, codings ...*dpb.Coding) *dpb.CodeableConcept {
	cc := &dpb.CodeableConcept{Coding: codings}
	if text != "" {
		cc.Text = str(text)
	}
	return cc
}

func reference(ref string) *dpb.Reference {
	return &dpb.Reference{Reference: &dpb.Reference_Uri{Uri: str(ref)}}
}

func instant(t time.Time) *dpb.Instant {
	t = t.UTC().Truncate(time.Millisecond)
	return &dpb.Instant{ValueUs: t.UnixMicro(), Timezone: "Z", Precision: dpb.Instant_MILLISECOND}
}

func dateTime(t time.Time) *dpb.DateTime {
	t = t.UTC().Truncate(time.Second)
	return &dpb.DateTime{ValueUs: t.UnixMicro(), Timezone: "Z", Precision: dpb.DateTime_SECOND}
}

func extension(url string, value *dpb.Extension_ValueX) *dpb.Extension {
	return &dpb.Extension{Url: uri(url), Value: value}
}

func extString(url, s string) *dpb.Extension {
	return extension(url, &dpb.Extension_ValueX{Choice: &dpb.Extension_ValueX_StringValue{StringValue: str(s)}})
}

func extCoding(url string, c *dpb.Coding) *dpb.Extension {
	return extension(url, &dpb.Extension_ValueX{Choice: &dpb.Extension_ValueX_Coding{Coding: c}})
}

func extIdentifier(url, system, value string) *dpb.Extension {
	return extension(url, &dpb.Extension_ValueX{Choice: &dpb.Extension_ValueX_Identifier{
		Identifier: &dpb.Identifier{System: uri(system), Value: str(value)},
	}})
}

// enumCode returns the FHIR code of a generated enum value name, for
// example ENTERED_IN_ERROR → "entered-in-error".
func enumCode(name string) string {
	if name == "INVALID_UNINITIALIZED" {
		return ""
	}
	return strings.ReplaceAll(strings.ToLower(name), "_", "-")
}

// comparatorText maps Quantity.comparator (FHIR R4 QuantityComparator) to its
// text.
var comparatorText = map[cpb.QuantityComparatorCode_Value]string{
	cpb.QuantityComparatorCode_LESS_THAN:                "<",
	cpb.QuantityComparatorCode_LESS_THAN_OR_EQUAL_TO:    "<=",
	cpb.QuantityComparatorCode_GREATER_THAN:             ">",
	cpb.QuantityComparatorCode_GREATER_THAN_OR_EQUAL_TO: ">=",
}

func comparatorCode(s string) (cpb.QuantityComparatorCode_Value, bool) {
	for k, v := range comparatorText {
		if v == s {
			return k, true
		}
	}
	return 0, false
}

// location returns the time zone of a google/fhir/go date or time value:
// "Z" or "UTC" is UTC, "+hh:mm" a fixed offset, anything else an IANA name.
func location(tz string) *time.Location {
	switch tz {
	case "", "Z", "UTC":
		return time.UTC
	}
	if len(tz) == 6 && (tz[0] == '+' || tz[0] == '-') && tz[3] == ':' {
		h, err1 := strconv.Atoi(tz[1:3])
		m, err2 := strconv.Atoi(tz[4:6])
		if err1 == nil && err2 == nil {
			off := h*3600 + m*60
			if tz[0] == '-' {
				off = -off
			}
			return time.FixedZone(tz, off)
		}
	}
	if l, err := time.LoadLocation(tz); err == nil {
		return l
	}
	return time.UTC
}

// dateTimeAt returns a DateTime as a time in its own zone, and whether it
// is precise to the day or better.
func dateTimeAt(dt *dpb.DateTime) (time.Time, bool) {
	if dt == nil || dt.GetPrecision() == dpb.DateTime_PRECISION_UNSPECIFIED {
		return time.Time{}, false
	}
	t := time.UnixMicro(dt.GetValueUs()).In(location(dt.GetTimezone()))
	return t, dt.GetPrecision() >= dpb.DateTime_DAY
}

// dateText renders a Date as it is written in JSON (YYYY, YYYY-MM or
// YYYY-MM-DD), and reports whether it is a full date.
func dateText(d *dpb.Date) (string, time.Time, bool) {
	if d == nil {
		return "", time.Time{}, false
	}
	t := time.UnixMicro(d.GetValueUs()).In(location(d.GetTimezone()))
	switch d.GetPrecision() {
	case dpb.Date_YEAR:
		return t.Format("2006"), time.Time{}, false
	case dpb.Date_MONTH:
		return t.Format("2006-01"), time.Time{}, false
	case dpb.Date_DAY:
		y, m, dd := t.Date()
		return t.Format("2006-01-02"), time.Date(y, m, dd, 0, 0, 0, 0, time.UTC), true
	}
	return "", time.Time{}, false
}

func clone[T proto.Message](m T) T { return proto.Clone(m).(T) }
