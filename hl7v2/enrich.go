package hl7v2

import (
	"fmt"
	"slices"
	"strconv"
	"strings"

	"filtrate/calc"
)

// EnrichOptions configure Enrich.
type EnrichOptions struct {
	// CommentSource is NTE-2 of added notes (HL7 v2.5.1 table 0105:
	// L ancillary (filler) department, P orderer, O other system).
	// Default "L": the notes carry the laboratory's reporting policy.
	CommentSource string
	// Flag returns OBX-8 (abnormal flags, table 0078) for a result; nil, or
	// an empty return, leaves OBX-8 empty.
	Flag func(calc.Result) string
	// Withdrawals[i] are the eGFR observations to withdraw in o.Orders[i]
	// (aligned with the outcomes; a shorter or nil slice means none). The
	// caller decides what is withdrawn and with which status; Enrich only
	// writes it.
	Withdrawals [][]Withdrawal
}

// Withdrawal is one eGFR observation sent earlier that the receiver must
// remove or flag. The caller (internal/ingest) decides which equations are
// withdrawn and with which status; Enrich writes each as an OBX with the
// same OBX-3 and OBX-4 as the result it withdraws.
type Withdrawal struct {
	// SourceID names the input OBX (Observation.SourceID) the withdrawal
	// follows: the input whose status, or whose correction, withdraws the
	// eGFR.
	SourceID string
	// Equation and EquationName identify the equation (OBX-17, and with
	// AssumedSex the OBX-4 sub-ID).
	Equation     string
	EquationName string
	// LOINC and LOINCName are OBX-3, as the result carried them.
	LOINC     string
	LOINCName string
	// Unit is OBX-6 (UCUM); empty means calc.UnitIndexed.
	Unit string
	// AssumedSex is "female" or "male" for a value calculated as if that
	// sex (calc.Result.AssumedSex), else empty.
	AssumedSex string
	// Status is OBX-11 (HL7 v2.5.1 table 0085): D (deletes the OBX
	// record), W (post original as wrong) or X (results cannot be
	// obtained for this observation).
	Status string
}

// MaxSubIDLength is the length of OBX-4 (ST, 20 characters in HL7 v2.5.1
// chapter 7, OBX segment field attributes). SubID never returns more.
const MaxSubIDLength = 20

// SubID returns the OBX-4 observation sub-ID of an eGFR observation: the
// equation ID, followed by ".F" or ".M" when the value is calculated as if
// female or male (calc.Result.AssumedSex). It depends on nothing else, so
// a result, its correction and its withdrawal carry the same OBX-3 and
// OBX-4 in every message, and a receiver that keys observations on
// OBX-3 + OBX-4 applies each to the right one even when several equations
// share a LOINC code (EKFC and CKiD U25 use the generic 69405-9) or the
// policy reports both sexes under one code. It fails when the sub-ID would
// exceed MaxSubIDLength or the assumed sex is neither female nor male.
func SubID(equation, assumedSex string) (string, error) {
	id := equation
	switch assumedSex {
	case "":
	case calc.SexFemale.String():
		id += ".F"
	case calc.SexMale.String():
		id += ".M"
	default:
		return "", fmt.Errorf("hl7v2: equation %q: assumed sex is neither female nor male", equation)
	}
	if equation == "" || len(id) > MaxSubIDLength {
		return "", fmt.Errorf("hl7v2: equation %q: observation sub-ID must have 1 to %d characters", equation, MaxSubIDLength)
	}
	return id, nil
}

// Enrich returns a copy of the message with the calculation outcomes and
// withdrawals written in. outcomes[i] belongs to o.Orders[i]; nil means no
// calculation for that order. The original message is not modified, and
// every segment Enrich does not change keeps its bytes, including MSH.
//
// Identity of the added observations: OBX-3 is the LOINC code of the
// result and OBX-4 the stable sub-ID of SubID, derived only from the
// equation and the assumed sex. A result, the corrected result that
// replaces it and the withdrawal that removes it therefore carry the same
// OBX-3 and OBX-4, whichever other results the message holds.
//
// For each order:
//
//   - Each Result becomes an OBX placed after the input OBX it derives from
//     (for a result from creatinine and cystatin C, the later of the two),
//     after that OBX's own NTE segments, so existing notes stay attached to
//     their observation: OBX-2 NM (SN ">^90" when the reported value has a
//     comparator, as a capped value does), OBX-3 <LOINC>^<LOINC name>^LN,
//     OBX-4 the sub-ID, OBX-5 the reported value, OBX-6 <unit>^^UCUM, OBX-8
//     from EnrichOptions.Flag, OBX-11 the status of its inputs (the least
//     final of them: R, P, S, then C, then F), OBX-14 the specimen
//     collection time as received, OBX-17 <equation id>^<equation name>^L
//     (OBX-17 is CE in v2.5.1 and CWE from v2.6; the first three
//     components are the same). NTE segments follow with the assumed sex if
//     any, the KDIGO category and each comment.
//   - Each Withdrawal becomes an OBX after the input OBX it names (and its
//     notes, and the results placed there): OBX-2 NM, OBX-3 and OBX-4 as
//     the result it withdraws, OBX-5 empty, OBX-6 the unit, OBX-11 the
//     withdrawal's status, OBX-14 the collection time, OBX-17 the
//     equation; then an NTE saying why.
//   - Each Refusal becomes an NTE after the input OBX it names (by
//     SourceID, else by analyte, else the order's first creatinine or
//     cystatin C result, else after the OBR), unless that input's status
//     already explains the absence of an eGFR. Identical notes at one place
//     are written once.
//   - Input status (OBX-11, HL7 v2.5.1 table 0085), for creatinine, cystatin
//     C and urine creatinine: X (results cannot be obtained), an empty or
//     unknown status get a note on the input. D and W get a note only when
//     no withdrawal names the input. Which eGFRs are withdrawn is not
//     decided here.
//
// OBX set IDs (OBX-1) following an insertion are renumbered within their
// order, or across the message when the sender numbers OBX segments across
// orders; non-numeric set IDs are left alone.
func (o *ORU) Enrich(outcomes []*calc.Outcome, opts EnrichOptions) (*Message, error) {
	if len(outcomes) != len(o.Orders) {
		return nil, fmt.Errorf("hl7v2: %d outcomes for %d orders", len(outcomes), len(o.Orders))
	}
	if len(opts.Withdrawals) > len(o.Orders) {
		return nil, fmt.Errorf("hl7v2: withdrawals for %d orders, message has %d", len(opts.Withdrawals), len(o.Orders))
	}
	if opts.CommentSource == "" {
		opts.CommentSource = "L"
	}
	e := &enricher{oru: o, d: o.msg.d, opts: opts, plans: map[int]*insertion{}}
	for i, ord := range o.Orders {
		var ws []Withdrawal
		if i < len(opts.Withdrawals) {
			ws = opts.Withdrawals[i]
		}
		if err := e.planOrder(ord, outcomes[i], ws); err != nil {
			return nil, err
		}
	}
	return e.build(), nil
}

type enricher struct {
	oru   *ORU
	d     Delimiters
	opts  EnrichOptions
	plans map[int]*insertion // keyed by the anchor segment's index
}

// insertion is what goes after one anchor segment and its NTE segments:
// first notes about the anchor, then blocks (an OBX and its NTEs).
type insertion struct {
	notes  []string
	blocks [][]*Segment
}

func (e *enricher) at(seg int) *insertion {
	p := e.plans[seg]
	if p == nil {
		p = &insertion{}
		e.plans[seg] = p
	}
	return p
}

func (e *enricher) note(seg int, text string) {
	p := e.at(seg)
	for _, n := range p.notes {
		if n == text {
			return
		}
	}
	p.notes = append(p.notes, text)
}

// Note texts. They contain no patient data.
const (
	noteCancelled     = "eGFR not calculated: the result could not be obtained (status X)."
	noteStatusUnknown = "eGFR not calculated: the result status is missing or not recognised."
	noteWithdrawn     = "Any eGFR calculated earlier from this result is withdrawn."
	noteDeleted       = "eGFR withdrawn: the result it was calculated from has been deleted."
	noteWrong         = "eGFR withdrawn: the result it was calculated from was reported in error."
	noteVoided        = "eGFR cancelled: the result it was calculated from could not be obtained."
	noteNoLonger      = "eGFR withdrawn: the corrected result it was calculated from no longer gives this eGFR."
)

// withdrawalStatuses are the OBX-11 codes of table 0085 a withdrawal may
// carry.
var withdrawalStatuses = map[string]bool{"D": true, "W": true, "X": true}

func (e *enricher) planOrder(ord *Order, out *calc.Outcome, withdrawals []Withdrawal) error {
	silenced := map[*Observation]bool{}
	named := map[string]bool{}
	for _, w := range withdrawals {
		named[w.SourceID] = true
	}
	for _, obs := range ord.Observations {
		if !primary(obs.Analyte) {
			continue
		}
		switch ClassifyStatus(obs.Status) {
		case StatusCancel:
			silenced[obs] = true
			e.note(obs.seg, noteCancelled)
		case StatusUnknown:
			silenced[obs] = true
			e.note(obs.seg, noteStatusUnknown)
		case StatusRetract:
			silenced[obs] = true
			if !named[obs.SourceID] {
				e.note(obs.seg, noteWithdrawn)
			}
		}
	}

	if out != nil {
		for _, r := range out.Results {
			if r.LOINC == "" {
				return fmt.Errorf("hl7v2: order %d: result of equation %q has no LOINC code", ord.Index, r.Equation)
			}
			if r.Reported == "" {
				return fmt.Errorf("hl7v2: order %d: result of equation %q has no reported value", ord.Index, r.Equation)
			}
			sub, err := SubID(r.Equation, r.AssumedSex)
			if err != nil {
				return fmt.Errorf("%w (order %d)", err, ord.Index)
			}
			used := usedObservations(ord, out, r)
			anchor := ord.seg
			switch {
			case len(used) > 0:
				for _, obs := range used {
					anchor = max(anchor, obs.seg)
				}
			case len(ord.Observations) > 0:
				anchor = ord.Observations[len(ord.Observations)-1].seg
			}
			p := e.at(anchor)
			p.blocks = append(p.blocks, e.resultBlock(ord, r, combinedStatus(append(used, statusOnly(ord, out, r)...)), sub))
		}
	}
	for _, w := range withdrawals {
		if w.LOINC == "" {
			return fmt.Errorf("hl7v2: order %d: withdrawal of equation %q has no LOINC code", ord.Index, w.Equation)
		}
		if !withdrawalStatuses[w.Status] {
			return fmt.Errorf("hl7v2: order %d: withdrawal of equation %q: status %q is not D, W or X", ord.Index, w.Equation, w.Status)
		}
		sub, err := SubID(w.Equation, w.AssumedSex)
		if err != nil {
			return fmt.Errorf("%w (order %d)", err, ord.Index)
		}
		input := ord.bySource(w.SourceID)
		anchor := ord.seg
		switch {
		case input != nil:
			anchor = input.seg
		case len(ord.Observations) > 0:
			anchor = ord.Observations[len(ord.Observations)-1].seg
		}
		p := e.at(anchor)
		p.blocks = append(p.blocks, e.withdrawalBlock(ord, w, sub, input))
	}
	if out != nil {
		for _, rf := range out.Refusals {
			obs := refusalAnchor(ord, rf)
			if obs != nil && silenced[obs] {
				continue
			}
			seg := ord.seg
			if obs != nil {
				seg = obs.seg
			}
			text := rf.Message
			if text == "" {
				text = rf.Code.Describe()
			}
			e.note(seg, text)
		}
	}
	return nil
}

func (ord *Order) bySource(id string) *Observation {
	if id == "" {
		return nil
	}
	for _, obs := range ord.Observations {
		if obs.SourceID == id {
			return obs
		}
	}
	return nil
}

// usedObservations finds the observations of the order a result was
// computed from: the inputs calc reports using, else the first usable
// observation of each analyte in Uses.
func usedObservations(ord *Order, out *calc.Outcome, r calc.Result) []*Observation {
	var used []*Observation
	for _, a := range r.Uses {
		var found *Observation
		for _, in := range out.Inputs {
			if in.Analyte == a {
				if obs := ord.bySource(in.SourceID); obs != nil {
					found = obs
					break
				}
			}
		}
		if found == nil {
			for _, obs := range ord.Observations {
				if obs.Analyte == a && ClassifyStatus(obs.Status) == StatusCompute {
					found = obs
					break
				}
			}
		}
		if found != nil {
			used = append(used, found)
		}
	}
	return used
}

// statusOnly finds the observations of the order that a result was also
// computed from without being placed beside them (height, weight, urine
// volume, collection time: calc.Result.Inputs beyond Uses), so that a
// corrected height gives a corrected eGFR.
func statusOnly(ord *Order, out *calc.Outcome, r calc.Result) []*Observation {
	var extra []*Observation
	for _, a := range r.Inputs {
		if slices.Contains(r.Uses, a) {
			continue
		}
		for _, in := range out.Inputs {
			if in.Analyte == a && in.Accepted {
				if obs := ord.bySource(in.SourceID); obs != nil {
					extra = append(extra, obs)
				}
			}
		}
	}
	return extra
}

// combinedStatus is the status of a value derived from observations: the
// least final of theirs (R, P, S before C before F), F when unknown.
func combinedStatus(used []*Observation) string {
	rank := map[string]int{"F": 1, "C": 2, "S": 3, "P": 4, "R": 5}
	best := "F"
	for _, obs := range used {
		if rank[obs.Status] > rank[best] {
			best = obs.Status
		}
	}
	return best
}

func refusalAnchor(ord *Order, rf calc.Refusal) *Observation {
	if obs := ord.bySource(rf.SourceID); obs != nil {
		return obs
	}
	if rf.Analyte != "" {
		var any *Observation
		for _, obs := range ord.Observations {
			if obs.Analyte != rf.Analyte {
				continue
			}
			if ClassifyStatus(obs.Status) == StatusCompute {
				return obs
			}
			if any == nil {
				any = obs
			}
		}
		if any != nil {
			return any
		}
	}
	for _, obs := range ord.Observations {
		if primary(obs.Analyte) {
			return obs
		}
	}
	return nil
}

// splitComparator splits a reported value such as ">90" or "<=15" into its
// comparator and number.
func splitComparator(s string) (cmp, num string, ok bool) {
	for _, c := range []string{">=", "<=", "<>", ">", "<", "="} {
		if strings.HasPrefix(s, c) {
			return c, strings.TrimSpace(s[len(c):]), true
		}
	}
	return "", s, false
}

// isNumber reports a plain decimal number: optional sign, digits, at most
// one decimal point (the NM data type, HL7 v2.5.1 chapter 2A).
func isNumber(s string) bool {
	s = strings.TrimPrefix(strings.TrimPrefix(s, "-"), "+")
	digits, dot := 0, false
	for i := 0; i < len(s); i++ {
		switch c := s[i]; {
		case c >= '0' && c <= '9':
			digits++
		case c == '.' && !dot:
			dot = true
		default:
			return false
		}
	}
	return digits > 0
}

func (e *enricher) resultBlock(ord *Order, r calc.Result, status, sub string) []*Segment {
	d := e.d
	valueType, value := "NM", d.EncodeText(r.Reported)
	if cmp, num, ok := splitComparator(r.Reported); ok {
		valueType, value = "SN", d.Components(cmp, num)
	} else if r.Capped {
		valueType, value = "SN", d.Components(">", r.Reported)
	} else if !isNumber(r.Reported) {
		valueType = "ST"
	}
	unit := r.Unit
	if unit == "" {
		unit = calc.UnitIndexed
	}
	flag := ""
	if e.opts.Flag != nil {
		flag = e.opts.Flag(r)
	}
	obx := e.obx(ord, valueType, r, sub, value, unit, flag, status)
	segs := []*Segment{obx}
	var notes []string
	if r.AssumedSex != "" {
		notes = append(notes, "Calculated as if the patient were "+r.AssumedSex+": sex is not recorded as female or male.")
	}
	if r.Category != "" {
		notes = append(notes, "KDIGO GFR category: "+r.Category)
	}
	notes = append(notes, r.Comments...)
	for i, n := range notes {
		segs = append(segs, e.nte(i+1, n))
	}
	return segs
}

// withdrawalBlock writes a withdrawal and the note saying why. The note
// follows the withdrawal's status, and for D the status of the input it
// names: an input that is itself deleted, or one that was corrected and no
// longer gives the eGFR.
func (e *enricher) withdrawalBlock(ord *Order, w Withdrawal, sub string, input *Observation) []*Segment {
	unit := w.Unit
	if unit == "" {
		unit = calc.UnitIndexed
	}
	text := noteDeleted
	switch {
	case w.Status == "W":
		text = noteWrong
	case w.Status == "X":
		text = noteVoided
	case input != nil && ClassifyStatus(input.Status) == StatusCompute:
		text = noteNoLonger
	}
	r := calc.Result{Equation: w.Equation, EquationName: w.EquationName, LOINC: w.LOINC, LOINCName: w.LOINCName}
	return []*Segment{e.obx(ord, "NM", r, sub, "", unit, "", w.Status), e.nte(1, text)}
}

func (e *enricher) obx(ord *Order, valueType string, r calc.Result, sub, value, unit, flag, status string) *Segment {
	d := e.d
	s := NewSegment(d, "OBX",
		"",        // 1 set ID, set when renumbering
		valueType, // 2 value type
		d.Components(r.LOINC, e.text(r.LOINCName), "LN"), // 3 observation identifier
		d.EncodeText(sub),              // 4 observation sub-ID
		value,                          // 5 observation value
		d.Components(unit, "", "UCUM"), // 6 units
		"",                             // 7 reference range
		d.EncodeText(flag),             // 8 abnormal flags
		"", "",                         // 9, 10
		d.EncodeText(status), // 11 observation result status
		"", "",               // 12, 13
		d.EncodeText(ord.CollectedText), // 14 date/time of the observation
		"", "",                          // 15, 16
		d.Components(r.Equation, e.text(r.EquationName), "L"), // 17 observation method
	)
	trimTrailing(s)
	return s
}

func (e *enricher) nte(setID int, text string) *Segment {
	d := e.d
	return NewSegment(d, "NTE", strconv.Itoa(setID), d.EncodeText(e.opts.CommentSource), d.EncodeText(e.text(text)))
}

// text prepares text filtrate adds for the message's character set: when
// MSH-18 declares none (which means ASCII, HL7 v2.5.1 section 2.15.9.18)
// or ASCII, the few non-ASCII characters filtrate's own texts use are
// written in ASCII and any other is replaced by '?'; a message declaring
// UNICODE UTF-8 gets the text as it is.
func (e *enricher) text(s string) string {
	cs := strings.ToUpper(strings.TrimSpace(e.oru.msg.MSH().Field(18).String()))
	if cs != "" && cs != "ASCII" {
		return s
	}
	return asciiText(s)
}

// asciiText folds text to ASCII.
func asciiText(s string) string {
	var b strings.Builder
	for _, r := range s {
		switch {
		case r < 0x80:
			b.WriteRune(r)
		case r == '–' || r == '—' || r == '−':
			b.WriteByte('-')
		case r == '²':
			b.WriteByte('2')
		case r == 'µ' || r == 'μ':
			b.WriteByte('u')
		case r == '×':
			b.WriteByte('x')
		case r == '≥':
			b.WriteString(">=")
		case r == '≤':
			b.WriteString("<=")
		case r == 'κ':
			b.WriteString("kappa")
		case r == 'α':
			b.WriteString("alpha")
		default:
			b.WriteByte('?')
		}
	}
	return b.String()
}

// build writes the planned insertions into a copy of the message and
// renumbers OBX set IDs.
func (e *enricher) build() *Message {
	segs := e.oru.msg.segments
	after := map[int]*insertion{}
	for anchor, p := range e.plans {
		end := anchor
		for end+1 < len(segs) && segs[end+1].Name() == "NTE" {
			end++
		}
		after[end] = p
	}
	out := make([]*Segment, 0, len(segs)+4*len(e.plans))
	inserted := make([]bool, 0, cap(out))
	for k, s := range segs {
		out = append(out, s.Clone())
		inserted = append(inserted, false)
		p := after[k]
		if p == nil {
			continue
		}
		n := 0
		if s.Name() == "NTE" {
			n, _ = strconv.Atoi(s.Field(1).String())
		}
		for _, text := range p.notes {
			n++
			out = append(out, e.nte(n, text))
			inserted = append(inserted, false)
		}
		for _, b := range p.blocks {
			for j, bs := range b {
				out = append(out, bs)
				inserted = append(inserted, j == 0)
			}
		}
	}
	renumberOBX(out, inserted, e.messageWideSetIDs())
	return &Message{d: e.d, segments: out}
}

// messageWideSetIDs reports whether the sender numbers OBX-1 across orders
// rather than restarting at 1 in each order.
func (e *enricher) messageWideSetIDs() bool {
	seen := false
	for _, ord := range e.oru.Orders {
		if len(ord.Observations) == 0 {
			continue
		}
		if n, err := strconv.Atoi(ord.Observations[0].SetID); err == nil && seen && n > 1 {
			return true
		}
		seen = true
	}
	return false
}

// renumberOBX gives inserted OBX segments the set ID after the previous OBX
// and shifts the numeric set IDs of the OBX segments after them.
func renumberOBX(segs []*Segment, inserted []bool, messageWide bool) {
	shift, prev, seen := 0, "", false
	for i, s := range segs {
		switch s.Name() {
		case "OBR":
			if !messageWide {
				shift, prev, seen = 0, "", false
			}
			continue
		case "OBX":
		default:
			continue
		}
		if inserted[i] {
			shift++
			id := ""
			if !seen {
				id = "1"
			} else if n, err := strconv.Atoi(prev); err == nil {
				id = strconv.Itoa(n + 1)
			}
			s.setField(1, id)
			prev, seen = id, true
			continue
		}
		id := s.Field(1).Raw()
		if n, err := strconv.Atoi(id); err == nil && shift > 0 {
			id = strconv.Itoa(n + shift)
			s.setField(1, id)
		}
		prev, seen = id, true
	}
}
