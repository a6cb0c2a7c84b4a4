package hl7v2

import (
	"fmt"
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
	// Retractions are the eGFR observations the laboratory reports, used
	// to withdraw them when an input arrives with status D or W: for each
	// template whose Uses contains the input's analyte, an OBX with that
	// LOINC code, unit and equation, the input's status and no value is
	// added. Only LOINC, LOINCName, Equation, EquationName, Unit and Uses
	// are read.
	Retractions []calc.Result
}

// Enrich returns a copy of the message with the calculation outcomes written
// in. outcomes[i] belongs to o.Orders[i]; nil means no calculation for that
// order. The original message is not modified, and every segment Enrich does
// not change keeps its bytes, including MSH.
//
// For each order:
//
//   - Each Result becomes an OBX placed after the input OBX it derives from
//     (for a result from creatinine and cystatin C, the later of the two),
//     after that OBX's own NTE segments, so existing notes stay attached to
//     their observation: OBX-2 NM (SN ">^90" when the reported value has a
//     comparator, as a capped value does), OBX-3 <LOINC>^<LOINC name>^LN,
//     OBX-4 a sub-ID only when one order gets the same code twice, OBX-5 the
//     reported value, OBX-6 <unit>^^UCUM, OBX-8 from EnrichOptions.Flag,
//     OBX-11 the status of its inputs (the least final of them: R, P, S,
//     then C, then F), OBX-14 the specimen collection time as received,
//     OBX-17 <equation id>^<equation name>^L (OBX-17 is CE in v2.5.1 and
//     CWE from v2.6; the first three components are the same). NTE segments
//     follow with the assumed sex if any, the KDIGO category and each
//     comment.
//   - Each Refusal becomes an NTE after the input OBX it names (by
//     SourceID, else by analyte, else the order's first creatinine or
//     cystatin C result, else after the OBR), unless that input's status
//     already explains the absence of an eGFR. Identical notes at one place
//     are written once.
//   - Input status (OBX-11, HL7 v2.5.1 table 0085), for creatinine, cystatin
//     C and urine creatinine: C (record is a correction) gives a corrected
//     eGFR with status C. X (results cannot be obtained) gives no eGFR and a
//     note. D (deletes the OBX record) and W (post original as wrong) give
//     an eGFR OBX per matching EnrichOptions.Retractions template (one that
//     uses the input's analyte and whose every analyte the order reports)
//     with the same status and an empty OBX-5, so the receiver removes or
//     flags the eGFR it holds, followed by a note; without a matching
//     template, a note on the input. An empty or unknown status gives a
//     note. I, N, O and U add nothing.
//
// OBX set IDs (OBX-1) following an insertion are renumbered within their
// order, or across the message when the sender numbers OBX segments across
// orders; non-numeric set IDs are left alone.
func (o *ORU) Enrich(outcomes []*calc.Outcome, opts EnrichOptions) (*Message, error) {
	if len(outcomes) != len(o.Orders) {
		return nil, fmt.Errorf("hl7v2: %d outcomes for %d orders", len(outcomes), len(o.Orders))
	}
	if opts.CommentSource == "" {
		opts.CommentSource = "L"
	}
	e := &enricher{oru: o, d: o.msg.d, opts: opts, plans: map[int]*insertion{}}
	for i, ord := range o.Orders {
		if err := e.planOrder(ord, outcomes[i]); err != nil {
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

// Note texts for statuses. They contain no patient data.
const (
	noteCancelled     = "eGFR not calculated: the result could not be obtained (status X)."
	noteStatusUnknown = "eGFR not calculated: the result status is missing or not recognised."
	noteWithdrawn     = "Any eGFR calculated earlier from this result is withdrawn."
	noteDeleted       = "eGFR withdrawn: the result it was calculated from has been deleted."
	noteWrong         = "eGFR withdrawn: the result it was calculated from was reported in error."
)

type retraction struct {
	tpl calc.Result
	obs *Observation
}

func (e *enricher) planOrder(ord *Order, out *calc.Outcome) error {
	silenced := map[*Observation]bool{}
	retractions := map[string]retraction{}
	var retractOrder []string
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
			matched := false
			for _, tpl := range e.opts.Retractions {
				if !usesAnalyte(tpl.Uses, obs.Analyte) || !ord.reports(tpl.Uses) {
					continue
				}
				matched = true
				key := tpl.Equation + "|" + tpl.LOINC
				r, seen := retractions[key]
				if !seen {
					retractOrder = append(retractOrder, key)
				}
				if !seen || obs.seg > r.obs.seg {
					retractions[key] = retraction{tpl: tpl, obs: obs}
				}
			}
			if !matched {
				e.note(obs.seg, noteWithdrawn)
			}
		}
	}

	if out != nil {
		codes := map[string]int{}
		for _, r := range out.Results {
			codes[r.LOINC]++
		}
		subIDs := map[string]int{}
		for _, r := range out.Results {
			if r.LOINC == "" {
				return fmt.Errorf("hl7v2: order %d: result of equation %q has no LOINC code", ord.Index, r.Equation)
			}
			if r.Reported == "" {
				return fmt.Errorf("hl7v2: order %d: result of equation %q has no reported value", ord.Index, r.Equation)
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
			sub := ""
			if codes[r.LOINC] > 1 {
				subIDs[r.LOINC]++
				sub = strconv.Itoa(subIDs[r.LOINC])
			}
			p := e.at(anchor)
			p.blocks = append(p.blocks, e.resultBlock(ord, r, combinedStatus(used), sub))
		}
	}
	for _, key := range retractOrder {
		r := retractions[key]
		p := e.at(r.obs.seg)
		p.blocks = append(p.blocks, e.retractionBlock(ord, r.tpl, r.obs.Status))
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

// reports tells whether the order holds an observation of every analyte, in
// any status: only then can an eGFR from all of them have been sent.
func (ord *Order) reports(analytes []calc.Analyte) bool {
	for _, a := range analytes {
		found := false
		for _, obs := range ord.Observations {
			if obs.Analyte == a {
				found = true
				break
			}
		}
		if !found {
			return false
		}
	}
	return true
}

func usesAnalyte(uses []calc.Analyte, a calc.Analyte) bool {
	for _, u := range uses {
		if u == a {
			return true
		}
	}
	return false
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

func (e *enricher) retractionBlock(ord *Order, tpl calc.Result, status string) []*Segment {
	unit := tpl.Unit
	if unit == "" {
		unit = calc.UnitIndexed
	}
	text := noteDeleted
	if status == "W" {
		text = noteWrong
	}
	return []*Segment{e.obx(ord, "NM", tpl, "", "", unit, "", status), e.nte(1, text)}
}

func (e *enricher) obx(ord *Order, valueType string, r calc.Result, sub, value, unit, flag, status string) *Segment {
	d := e.d
	s := NewSegment(d, "OBX",
		"",                                       // 1 set ID, set when renumbering
		valueType,                                // 2 value type
		d.Components(r.LOINC, r.LOINCName, "LN"), // 3 observation identifier
		d.EncodeText(sub),                        // 4 observation sub-ID
		value,                                    // 5 observation value
		d.Components(unit, "", "UCUM"),           // 6 units
		"",                                       // 7 reference range
		d.EncodeText(flag),                       // 8 abnormal flags
		"", "",                                   // 9, 10
		d.EncodeText(status), // 11 observation result status
		"", "",               // 12, 13
		d.EncodeText(ord.CollectedText), // 14 date/time of the observation
		"", "",                          // 15, 16
		d.Components(r.Equation, r.EquationName, "L"), // 17 observation method
	)
	trimTrailing(s)
	return s
}

func (e *enricher) nte(setID int, text string) *Segment {
	d := e.d
	return NewSegment(d, "NTE", strconv.Itoa(setID), d.EncodeText(e.opts.CommentSource), d.EncodeText(text))
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
