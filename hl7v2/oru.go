package hl7v2

import (
	"errors"
	"fmt"
	"strconv"
	"strings"
	"time"

	"filtrate/calc"
)

// CodeEntry maps one observation identifier (OBX-3) to an analyte.
type CodeEntry struct {
	// System is the coding system of OBX-3 (component 3 or 6), e.g. "LN"
	// for LOINC or a local "L" / "99xxx" system. Empty matches any system,
	// which suits local codes sent without one.
	System string
	// Code is the identifier (OBX-3 component 1 or 4).
	Code    string
	Analyte calc.Analyte
	// Unit, if set, is assumed when OBX-6 is empty.
	Unit string
}

// DefaultCodeEntries returns the LOINC codes mapped by default (codes from
// LOINC; names as published by LOINC, from memory):
//
//	2160-0   Creatinine [Mass/volume] in Serum or Plasma
//	14682-9  Creatinine [Moles/volume] in Serum or Plasma
//	38483-4  Creatinine [Mass/volume] in Blood
//	59826-8  Creatinine [Moles/volume] in Blood
//	33863-2  Cystatin C [Mass/volume] in Serum or Plasma
//	8302-2   Body height
//	29463-7  Body weight
func DefaultCodeEntries() []CodeEntry {
	return []CodeEntry{
		{System: "LN", Code: "2160-0", Analyte: calc.Creatinine},
		{System: "LN", Code: "14682-9", Analyte: calc.Creatinine},
		{System: "LN", Code: "38483-4", Analyte: calc.Creatinine},
		{System: "LN", Code: "59826-8", Analyte: calc.Creatinine},
		{System: "LN", Code: "33863-2", Analyte: calc.CystatinC},
		{System: "LN", Code: "8302-2", Analyte: calc.Height},
		{System: "LN", Code: "29463-7", Analyte: calc.Weight},
	}
}

// CodeMap finds the analyte an OBX reports. It is immutable once built and
// safe for concurrent use.
type CodeMap struct {
	exact  map[[2]string]CodeEntry // {system, code}
	anySys map[string]CodeEntry    // code, for entries without a system
}

// NewCodeMap builds a map from entries. A later entry for the same system and
// code replaces an earlier one, so local configuration can override the
// defaults: NewCodeMap(append(DefaultCodeEntries(), local...)...).
func NewCodeMap(entries ...CodeEntry) (*CodeMap, error) {
	m := &CodeMap{exact: map[[2]string]CodeEntry{}, anySys: map[string]CodeEntry{}}
	for i, e := range entries {
		if e.Code == "" {
			return nil, fmt.Errorf("hl7v2: code map entry %d: empty code", i+1)
		}
		if e.Analyte == "" {
			return nil, fmt.Errorf("hl7v2: code map entry %d (%s): no analyte", i+1, e.Code)
		}
		if e.System == "" {
			m.anySys[e.Code] = e
		} else {
			m.exact[[2]string{e.System, e.Code}] = e
		}
	}
	return m, nil
}

// DefaultCodeMap returns a map of DefaultCodeEntries.
func DefaultCodeMap() *CodeMap {
	m, err := NewCodeMap(DefaultCodeEntries()...)
	if err != nil {
		panic(err) // the defaults are constant
	}
	return m
}

// Lookup finds the entry for an observation identifier (a CE/CWE field such
// as OBX-3): first the identifier with its coding system (components 1 and
// 3), then the alternate identifier with its system (components 4 and 6),
// then either identifier against entries without a system.
func (m *CodeMap) Lookup(id Field) (CodeEntry, bool) {
	code, sys := id.Component(1).String(), id.Component(3).String()
	alt, altSys := id.Component(4).String(), id.Component(6).String()
	if e, ok := m.exact[[2]string{sys, code}]; ok && code != "" {
		return e, true
	}
	if e, ok := m.exact[[2]string{altSys, alt}]; ok && alt != "" {
		return e, true
	}
	if e, ok := m.anySys[code]; ok && code != "" {
		return e, true
	}
	if e, ok := m.anySys[alt]; ok && alt != "" {
		return e, true
	}
	return CodeEntry{}, false
}

// StatusAction is what an observation result status (OBX-11, HL7 v2.5.1
// table 0085) means for a derived eGFR.
type StatusAction int

// Status actions.
const (
	// StatusCompute: F (final), C (corrected), P (preliminary), R (not
	// verified), S (partial). The value is used and the eGFR carries the
	// same status; a correction gives a corrected eGFR.
	StatusCompute StatusAction = iota
	// StatusCancel: X (results cannot be obtained). No eGFR; an eGFR OBX
	// with status X and no value cancels any eGFR sent earlier from this
	// result, and a note says why.
	StatusCancel
	// StatusRetract: D (deletes the OBX record) and W (posted as wrong).
	// An eGFR OBX with the same status and no value withdraws the eGFR
	// sent earlier from this result. (Which eGFRs to withdraw is decided
	// by the caller: see EnrichOptions.Withdrawals.)
	StatusRetract
	// StatusPending: I (specimen in lab), N (not asked), O (order detail
	// only), U (status change to final without retransmitting the value).
	// There is no value to use; nothing is added.
	StatusPending
	// StatusUnknown: empty or not in table 0085 for v2.5.1. No eGFR; a note
	// says why.
	StatusUnknown
)

// ClassifyStatus maps an OBX-11 code to its action.
func ClassifyStatus(code string) StatusAction {
	switch code {
	case "F", "C", "P", "R", "S":
		return StatusCompute
	case "X":
		return StatusCancel
	case "D", "W":
		return StatusRetract
	case "I", "N", "O", "U":
		return StatusPending
	default:
		return StatusUnknown
	}
}

// ErrNotORU is returned by ExtractORU for a message whose MSH-9 message code
// is not ORU.
var ErrNotORU = errors.New("hl7v2: not an ORU message")

// ExtractOptions configure ExtractORU.
type ExtractOptions struct {
	// Codes maps OBX-3 to analytes. Default DefaultCodeMap().
	Codes *CodeMap
	// Location is the time zone of date/time values sent without a UTC
	// offset. Default UTC.
	Location *time.Location
}

// ORU is the calculation-relevant content of an observation result message.
type ORU struct {
	msg *Message
	// ControlID is MSH-10.
	ControlID string
	// Patients holds one entry per PID segment, in message order.
	Patients []*Patient
	// Orders holds one entry per OBR segment, in message order.
	Orders []*Order

	loose []*Observation // OBX segments before any OBR
	loc   *time.Location // the laboratory's zone (ExtractOptions.Location)
}

// Patient is what a PID segment says about the patient.
type Patient struct {
	// ID and AssigningAuthority come from the first repetition of PID-3
	// (CX-1 and CX-4; CX-4's namespace ID, or its universal ID when the
	// namespace is empty).
	ID                 string
	AssigningAuthority string
	// Identifiers holds every repetition of PID-3.
	Identifiers []PatientIdentifier
	// BirthDate is PID-7; zero when absent or not a valid date/time, in
	// which case BirthDateInvalid tells which.
	BirthDate        DTM
	BirthDateInvalid bool
	// SexCode is PID-8 as received (table 0001); Sex its meaning.
	SexCode string
	Sex     calc.Sex
}

// PatientIdentifier is one repetition of PID-3 (CX).
type PatientIdentifier struct {
	ID                 string // CX-1
	AssigningAuthority string // CX-4
	TypeCode           string // CX-5, e.g. MR
}

// Order is one OBR segment and the segments that follow it up to the next
// OBR or PID.
type Order struct {
	// Index is the 1-based position of the OBR among the message's OBR
	// segments; it names the order in SourceIDs ("OBR2/OBX1").
	Index int
	// Patient is the patient of the PID segment before the OBR, or nil.
	Patient *Patient
	// SetID, PlacerOrder and FillerOrder are OBR-1, OBR-2.1 and OBR-3.1.
	SetID, PlacerOrder, FillerOrder string
	// CollectedAt is the specimen collection time: SPM-17 (range start) of
	// the first SPM segment of the order that has one, else OBR-7.
	// CollectedFrom names the field used ("SPM-17" or "OBR-7", empty when
	// neither is valued); CollectedText is its text as received, copied to
	// OBX-14 of added eGFR observations. CollectedInvalid reports a value
	// that is not a valid date/time (CollectedAt is then zero).
	CollectedAt      DTM
	CollectedFrom    string
	CollectedText    string
	CollectedInvalid bool
	// Observations holds the OBX segments of the order in message order.
	Observations []*Observation

	seg int  // index of the OBR segment
	oru *ORU // the message it belongs to
}

// Observation is one OBX segment.
type Observation struct {
	// SourceID names the OBX for calc and audit: "OBR<order>/OBX<n>", n
	// counting the OBX segments of the order from 1 (independent of OBX-1,
	// which senders do not always fill). OBX segments before any OBR are
	// named "OBX<n>".
	SourceID string
	// SetID is OBX-1; ValueType OBX-2; Code and CodeSystem OBX-3.1 and
	// OBX-3.3.
	SetID, ValueType, Code, CodeSystem string
	// Analyte is the mapped analyte, empty when OBX-3 is not mapped.
	Analyte calc.Analyte
	// Status is OBX-11 (table 0085).
	Status string
	// ObservedAt is OBX-14; zero when absent or invalid.
	ObservedAt DTM
	// Measurement is the value for calc (valid when Analyte is set):
	// OBX-5 (NM as sent; SN written out, e.g. "<^0.2" as "<0.2"), OBX-6.1
	// unit, OBX-17.1 method, OBX-18.1 instrument.
	Measurement calc.Measurement

	seg     int
	patient *Patient
}

// Segment returns the order's OBR segment.
func (ord *Order) Segment() *Segment {
	if ord.oru == nil {
		return nil
	}
	return ord.oru.msg.Segment(ord.seg)
}

// Message returns the message the ORU was extracted from.
func (o *ORU) Message() *Message { return o.msg }

// ExtractORU reads patients, orders and observations from an ORU message.
// Invalid dates and unmapped codes are not errors: they leave the value
// unset so that calc refuses the calculation with a reason.
func ExtractORU(m *Message, opts ExtractOptions) (*ORU, error) {
	if code, _, _ := m.Type(); code != "ORU" {
		return nil, ErrNotORU
	}
	codes := opts.Codes
	if codes == nil {
		codes = DefaultCodeMap()
	}
	loc := opts.Location
	if loc == nil {
		loc = time.UTC
	}
	o := &ORU{msg: m, ControlID: m.ControlID(), loc: loc}
	var (
		patient *Patient
		order   *Order
		loose   int // OBX segments before any OBR
	)
	for i, s := range m.segments {
		switch s.Name() {
		case "PID":
			patient = readPatient(s, loc)
			o.Patients = append(o.Patients, patient)
			order = nil
		case "OBR":
			order = &Order{
				Index:       len(o.Orders) + 1,
				Patient:     patient,
				SetID:       s.Field(1).String(),
				PlacerOrder: s.Field(2).String(),
				FillerOrder: s.Field(3).String(),
				seg:         i,
				oru:         o,
			}
			o.Orders = append(o.Orders, order)
			if t := s.Field(7).Component(1).String(); t != "" {
				order.setCollected("OBR-7", t, loc)
			}
		case "SPM":
			if order != nil && order.CollectedFrom != "SPM-17" {
				if t := s.Field(17).Component(1).Sub(1); t != "" {
					order.setCollected("SPM-17", t, loc)
				}
			}
		case "OBX":
			obs := readObservation(s, codes, loc)
			obs.seg, obs.patient = i, patient
			if order != nil {
				order.Observations = append(order.Observations, obs)
				obs.SourceID = "OBR" + strconv.Itoa(order.Index) + "/OBX" + strconv.Itoa(len(order.Observations))
				obs.Measurement.SourceID = obs.SourceID
			} else {
				loose++
				obs.SourceID = "OBX" + strconv.Itoa(loose)
				obs.Measurement.SourceID = obs.SourceID
				o.loose = append(o.loose, obs)
			}
		}
	}
	return o, nil
}

func (ord *Order) setCollected(from, text string, loc *time.Location) {
	ord.CollectedFrom, ord.CollectedText = from, text
	t, err := ParseDTM(text, loc)
	ord.CollectedAt, ord.CollectedInvalid = t, err != nil
}

func readPatient(s *Segment, loc *time.Location) *Patient {
	p := &Patient{}
	ids := s.Field(3)
	for r := 1; r <= ids.Reps(); r++ {
		rep := ids.Rep(r)
		aa := rep.Component(4)
		auth := aa.Sub(1)
		if auth == "" {
			auth = aa.Sub(2)
		}
		p.Identifiers = append(p.Identifiers, PatientIdentifier{
			ID:                 rep.Component(1).String(),
			AssigningAuthority: auth,
			TypeCode:           rep.Component(5).String(),
		})
	}
	if len(p.Identifiers) > 0 {
		p.ID, p.AssigningAuthority = p.Identifiers[0].ID, p.Identifiers[0].AssigningAuthority
	}
	if t := s.Field(7).Component(1).String(); t != "" {
		dob, err := ParseDTM(t, loc)
		p.BirthDate, p.BirthDateInvalid = dob, err != nil
	}
	p.SexCode = s.Field(8).String()
	p.Sex = calc.ParseSex(p.SexCode)
	return p
}

func readObservation(s *Segment, codes *CodeMap, loc *time.Location) *Observation {
	id := s.Field(3)
	obs := &Observation{
		SetID:      s.Field(1).String(),
		ValueType:  s.Field(2).String(),
		Code:       id.Component(1).String(),
		CodeSystem: id.Component(3).String(),
		Status:     s.Field(11).String(),
	}
	if t := s.Field(14).Component(1).String(); t != "" {
		obs.ObservedAt, _ = ParseDTM(t, loc)
	}
	e, ok := codes.Lookup(id)
	if !ok {
		return obs
	}
	obs.Analyte = e.Analyte
	unit := obxUnit(s.Field(6), e.Unit)
	obs.Measurement = calc.Measurement{
		Analyte:    e.Analyte,
		ValueText:  valueText(s.Field(5), obs.ValueType),
		Unit:       unit,
		Method:     s.Field(17).Component(1).String(),
		Instrument: s.Field(18).Component(1).String(),
	}
	return obs
}

// obxUnit returns the unit of OBX-6 (CE: identifier^text^system^
// alternate identifier^alternate text^alternate system). The identifier
// (component 1) is the unit; when it is empty but the alternate is coded in
// UCUM, the alternate identifier. A configured default unit applies only
// when the whole field is empty. Anything else is passed through as sent,
// so that calc refuses it as an unknown unit rather than a guess.
func obxUnit(f Field, defaultUnit string) string {
	if f.IsEmpty() {
		return defaultUnit
	}
	if u := strings.TrimSpace(f.Component(1).String()); u != "" {
		return u
	}
	if strings.EqualFold(f.Component(6).String(), "UCUM") {
		if u := strings.TrimSpace(f.Component(4).String()); u != "" {
			return u
		}
	}
	return f.d.DecodeText(f.Raw())
}

// valueText renders OBX-5 as one text for calc. A structured numeric (SN,
// HL7 v2.5.1 section 2.A.71: comparator^num1^separator/suffix^num2) is
// written out, so "<^0.2" becomes "<0.2" and calc sees a censored value.
// Anything with several repetitions or components is passed with its
// separators, which calc rejects as not numeric.
func valueText(f Field, valueType string) string {
	d := f.d
	switch {
	case f.Reps() > 1:
		return d.DecodeText(f.Raw())
	case valueType == "SN":
		// Only a comparator and num1 make a single value; a separator or
		// num2 (a ratio or range such as "^1^:^5") is passed as sent and
		// refused. "=" is the explicit form of no comparator.
		if f.Components() > 2 || subcomponents(f) {
			return d.DecodeText(f.Raw())
		}
		cmp := strings.TrimSpace(f.Component(1).String())
		if cmp == "=" {
			cmp = ""
		}
		return cmp + strings.TrimSpace(f.Component(2).String())
	case f.Components() > 1 || subcomponents(f):
		return d.DecodeText(f.Raw())
	}
	return strings.TrimSpace(f.String())
}

// subcomponents reports whether a field's first repetition holds a
// subcomponent separator.
func subcomponents(f Field) bool {
	return !f.literal && strings.ContainsRune(f.Rep(1).raw, rune(f.d.Subcomponent))
}

// primary reports analytes that a calculation is made from (as opposed to
// height and weight, which only qualify it).
func primary(a calc.Analyte) bool {
	return a == calc.Creatinine || a == calc.CystatinC || a == calc.UrineCreatinine
}

// NeedsCalculation reports whether order i (0-based) holds a creatinine,
// cystatin C or urine creatinine result with a usable status, that is,
// whether calc should be asked.
func (o *ORU) NeedsCalculation(i int) bool {
	for _, obs := range o.Orders[i].Observations {
		if primary(obs.Analyte) && ClassifyStatus(obs.Status) == StatusCompute {
			return true
		}
	}
	return false
}

// Measurements returns the inputs of order i (0-based) for calc: its mapped
// observations with a usable status (ClassifyStatus gives StatusCompute).
// Height and weight reported elsewhere in the message for the same patient
// are added when the order has none of its own, and only when they were
// observed within a day of this order's specimen (OBX-14, else their own
// order's collection time): a child's height from another visit must not
// feed a height-based equation.
func (o *ORU) Measurements(i int) []calc.Measurement {
	ord := o.Orders[i]
	var out []calc.Measurement
	own := map[calc.Analyte]bool{}
	for _, obs := range ord.Observations {
		if obs.Analyte != "" && ClassifyStatus(obs.Status) == StatusCompute {
			out = append(out, obs.Measurement)
			own[obs.Analyte] = true
		}
	}
	for _, a := range []calc.Analyte{calc.Height, calc.Weight} {
		if own[a] {
			continue
		}
		for _, obs := range o.all() {
			if obs.Analyte == a && obs.patient == ord.Patient && ClassifyStatus(obs.Status) == StatusCompute && o.sameDay(obs, ord) {
				out = append(out, obs.Measurement)
			}
		}
	}
	return out
}

// sameDay reports whether obs was observed within 24 hours of ord's
// specimen collection; unknown times do not qualify.
func (o *ORU) sameDay(obs *Observation, ord *Order) bool {
	at := obs.ObservedAt
	if at.Precision < PrecisionDay {
		for _, other := range o.Orders {
			for _, x := range other.Observations {
				if x == obs {
					at = other.CollectedAt
				}
			}
		}
	}
	if at.Precision < PrecisionDay || ord.CollectedAt.Precision < PrecisionDay {
		return false
	}
	d := at.Time.Sub(ord.CollectedAt.Time)
	return d <= 24*time.Hour && d >= -24*time.Hour
}

// all returns every observation of the message in order.
func (o *ORU) all() []*Observation {
	out := append([]*Observation(nil), o.loose...)
	for _, ord := range o.Orders {
		out = append(out, ord.Observations...)
	}
	return out
}

// Request returns the calculation request for order i (0-based) with sex,
// date of birth, collection time and measurements filled in. The caller adds
// the policy, calibrations and, if wanted, a fixed equation. A date of birth
// or collection time given to less than a day (a year or month alone) is left
// out, so that calc refuses for a missing age rather than guess one.
func (o *ORU) Request(i int) calc.Request {
	ord := o.Orders[i]
	req := calc.Request{Measurements: o.Measurements(i)}
	if ord.CollectedAt.Precision >= PrecisionDay {
		// Age counts calendar days in the laboratory's zone, whatever
		// offset the sender wrote.
		req.CollectedAt = ord.CollectedAt.Time.In(o.loc)
	}
	if p := ord.Patient; p != nil {
		req.Sex = p.Sex
		if p.BirthDate.Precision >= PrecisionDay {
			req.BirthDate = p.BirthDate.Time
		}
	}
	return req
}
