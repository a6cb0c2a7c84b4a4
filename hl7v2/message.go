package hl7v2

import (
	"errors"
	"fmt"
	"strings"
)

// Limits bound the work and memory one message may cost. A zero field means
// the default.
type Limits struct {
	// MaxMessageBytes is the largest accepted message. Default 8 MiB.
	MaxMessageBytes int
	// MaxSegments is the largest accepted number of segments. Default 20000.
	MaxSegments int
	// MaxFields is the largest accepted field position in any segment.
	// Default 500.
	MaxFields int
}

// DefaultLimits returns the limits used by [Parse].
func DefaultLimits() Limits {
	return Limits{MaxMessageBytes: 8 << 20, MaxSegments: 20000, MaxFields: 500}
}

func (l Limits) withDefaults() Limits {
	def := DefaultLimits()
	if l.MaxMessageBytes <= 0 {
		l.MaxMessageBytes = def.MaxMessageBytes
	}
	if l.MaxSegments <= 0 {
		l.MaxSegments = def.MaxSegments
	}
	if l.MaxFields <= 0 {
		l.MaxFields = def.MaxFields
	}
	return l
}

// Message is a parsed HL7 v2 message: an ordered list of segments sharing the
// delimiters declared in its MSH segment.
//
// A Message is not safe for concurrent modification; concurrent reads are
// safe.
type Message struct {
	d        Delimiters
	segments []*Segment
}

// Parse parses a message with [DefaultLimits].
func Parse(data []byte) (*Message, error) {
	return ParseLimits(data, Limits{})
}

// ParseLimits parses a message. The first segment must be MSH; its fourth
// byte is the field separator and MSH-2 declares the other delimiters (four
// characters, or five with the truncation character of HL7 v2.7). Segments
// end with carriage return, line feed, or both; blank lines are skipped.
//
// Errors are of type *[ParseError].
func ParseLimits(data []byte, lim Limits) (*Message, error) {
	lim = lim.withDefaults()
	if len(data) > lim.MaxMessageBytes {
		return nil, &ParseError{Err: ErrMessageTooLarge}
	}
	text := strings.TrimLeft(string(data), "\r\n")
	if text == "" {
		return nil, &ParseError{Err: ErrEmpty}
	}
	d, err := headerDelimiters(text)
	if err != nil {
		return nil, err
	}
	m := &Message{d: d, segments: make([]*Segment, 0, strings.Count(text, "\r")+1)}
	for pos := 0; pos < len(text); {
		end := strings.IndexAny(text[pos:], "\r\n")
		var line string
		if end < 0 {
			line, pos = text[pos:], len(text)
		} else {
			end += pos
			line, pos = text[pos:end], end+1
			if text[end] == '\r' && pos < len(text) && text[pos] == '\n' {
				pos++
			}
		}
		if line == "" {
			continue
		}
		if len(m.segments) == lim.MaxSegments {
			return nil, &ParseError{Segment: len(m.segments) + 1, Err: ErrTooManySegments}
		}
		seg, err := parseSegment(line, d, len(m.segments) == 0, lim.MaxFields)
		if err != nil {
			err.Segment = len(m.segments) + 1
			if err.SegmentType != "" {
				err.Sequence = m.count(err.SegmentType) + 1
			}
			return nil, err
		}
		m.segments = append(m.segments, seg)
	}
	return m, nil
}

// ParseMSH parses only the first segment of data, which must be MSH. It is
// meant for answering a message that cannot be parsed as a whole (too large,
// or broken further on) with an acknowledgement addressed to its sender.
func ParseMSH(data []byte) (*Message, error) {
	text := strings.TrimLeft(string(data), "\r\n")
	if end := strings.IndexAny(text, "\r\n"); end >= 0 {
		text = text[:end]
	}
	return ParseLimits([]byte(text), Limits{})
}

// headerDelimiters reads MSH-1 and MSH-2.
func headerDelimiters(text string) (Delimiters, error) {
	if !strings.HasPrefix(text, "MSH") {
		return Delimiters{}, &ParseError{Segment: 1, Err: ErrNoMSH}
	}
	if len(text) < 4 {
		return Delimiters{}, &ParseError{Segment: 1, SegmentType: "MSH", Sequence: 1, Field: 1, Err: ErrDelimiters}
	}
	d := Delimiters{Field: text[3]}
	enc := text[4:]
	if i := strings.IndexAny(enc, string([]byte{d.Field, '\r', '\n'})); i >= 0 {
		enc = enc[:i]
	}
	if len(enc) != 4 && len(enc) != 5 {
		return Delimiters{}, &ParseError{Segment: 1, SegmentType: "MSH", Sequence: 1, Field: 2, Err: ErrDelimiters}
	}
	d.Component, d.Repetition, d.Escape, d.Subcomponent = enc[0], enc[1], enc[2], enc[3]
	if len(enc) == 5 {
		d.Truncation = enc[4]
	}
	if err := d.Validate(); err != nil {
		return Delimiters{}, &ParseError{Segment: 1, SegmentType: "MSH", Sequence: 1, Field: 2, Err: ErrDelimiters}
	}
	return d, nil
}

// validSegmentName reports whether s is a segment ID: an upper-case letter
// followed by two upper-case letters or digits.
func validSegmentName(s string) bool {
	if len(s) != 3 || s[0] < 'A' || s[0] > 'Z' {
		return false
	}
	for i := 1; i < 3; i++ {
		c := s[i]
		if (c < 'A' || c > 'Z') && (c < '0' || c > '9') {
			return false
		}
	}
	return true
}

func parseSegment(line string, d Delimiters, first bool, maxFields int) (*Segment, *ParseError) {
	if len(line) < 3 || !validSegmentName(line[:3]) || (len(line) > 3 && line[3] != d.Field) {
		return nil, &ParseError{Err: ErrSegmentName}
	}
	name := line[:3]
	isMSH := name == "MSH"
	if isMSH != first {
		if isMSH {
			return nil, &ParseError{SegmentType: name, Err: ErrUnexpectedMSH}
		}
		return nil, &ParseError{Err: ErrNoMSH}
	}
	n := strings.Count(line, string(d.Field)) // highest field position
	if isMSH {
		n++ // MSH-1 is the separator itself
	}
	if n > maxFields {
		return nil, &ParseError{SegmentType: name, Field: maxFields + 1, Err: ErrTooManyFields}
	}
	var fields []string
	if isMSH {
		parts := strings.Split(line, string(d.Field))
		fields = make([]string, 0, len(parts)+1)
		fields = append(fields, name, string(d.Field))
		fields = append(fields, parts[1:]...)
	} else {
		fields = strings.Split(line, string(d.Field))
	}
	return &Segment{d: d, raw: line, fields: fields}, nil
}

func (m *Message) count(name string) int {
	n := 0
	for _, s := range m.segments {
		if s.Name() == name {
			n++
		}
	}
	return n
}

// Delimiters returns the delimiters the message declares.
func (m *Message) Delimiters() Delimiters { return m.d }

// Len returns the number of segments.
func (m *Message) Len() int { return len(m.segments) }

// Segment returns the segment at index i (0-based; index 0 is MSH).
func (m *Message) Segment(i int) *Segment { return m.segments[i] }

// Segments returns the segments in order. The slice is a copy; the segments
// are shared.
func (m *Message) Segments() []*Segment { return append([]*Segment(nil), m.segments...) }

// MSH returns the message header segment.
func (m *Message) MSH() *Segment { return m.segments[0] }

// First returns the first segment with the given ID, or nil.
func (m *Message) First(name string) *Segment {
	for _, s := range m.segments {
		if s.Name() == name {
			return s
		}
	}
	return nil
}

// ControlID returns MSH-10, the message control ID.
func (m *Message) ControlID() string { return m.MSH().Field(10).String() }

// Type returns the message code, trigger event and message structure of
// MSH-9, e.g. "ORU", "R01", "ORU_R01".
func (m *Message) Type() (code, event, structure string) {
	f := m.MSH().Field(9)
	return f.Component(1).String(), f.Component(2).String(), f.Component(3).String()
}

// Version returns the version ID of MSH-12, e.g. "2.5.1".
func (m *Message) Version() string { return m.MSH().Field(12).String() }

// Insert inserts segments before index i (0 < i <= Len()). The segments must
// use the message's delimiters and must not be MSH. Insert panics otherwise,
// as it does for an index out of range.
func (m *Message) Insert(i int, segs ...*Segment) {
	if i < 1 || i > len(m.segments) {
		panic(fmt.Sprintf("hl7v2: insert index %d out of range [1,%d]", i, len(m.segments)))
	}
	m.check(segs)
	m.segments = append(m.segments[:i], append(segs, m.segments[i:]...)...)
}

// Append adds segments at the end, with the same rules as Insert.
func (m *Message) Append(segs ...*Segment) {
	m.check(segs)
	m.segments = append(m.segments, segs...)
}

func (m *Message) check(segs []*Segment) {
	for _, s := range segs {
		if s.d != m.d {
			panic("hl7v2: segment delimiters differ from the message's")
		}
		if s.Name() == "MSH" {
			panic("hl7v2: a message has exactly one MSH segment")
		}
	}
}

// Clone returns a copy of the message whose segments can be modified without
// affecting m.
func (m *Message) Clone() *Message {
	c := &Message{d: m.d, segments: make([]*Segment, len(m.segments))}
	for i, s := range m.segments {
		c.segments[i] = s.Clone()
	}
	return c
}

// Encode returns the message text: every segment followed by a carriage
// return. Segments that were parsed and not modified are written exactly as
// they were read.
func (m *Message) Encode() []byte {
	n := 0
	for _, s := range m.segments {
		n += s.encodedLen() + 1
	}
	b := make([]byte, 0, n)
	for _, s := range m.segments {
		b = s.appendTo(b)
		b = append(b, '\r')
	}
	return b
}

// Segment is one segment of a message. Its fields are kept as encoded text;
// an unmodified parsed segment also keeps the exact text it was read from.
type Segment struct {
	d      Delimiters
	raw    string   // text as read; valid while !dirty
	fields []string // encoded field text indexed by HL7 position; [0] is the name
	dirty  bool
}

// NewSegment builds a segment from encoded field text for positions 1, 2, ...
// (use [Delimiters.EncodeText] and [Delimiters.Components] to encode values). For
// "MSH", fields 1 and 2 are set from d and the given fields start at MSH-3.
// NewSegment panics if name is not a valid segment ID.
func NewSegment(d Delimiters, name string, fields ...string) *Segment {
	if !validSegmentName(name) {
		panic("hl7v2: invalid segment name")
	}
	f := make([]string, 0, len(fields)+3)
	f = append(f, name)
	if name == "MSH" {
		f = append(f, string(d.Field), d.EncodingCharacters())
	}
	f = append(f, fields...)
	return &Segment{d: d, fields: f, dirty: true}
}

// Name returns the segment ID, e.g. "OBX".
func (s *Segment) Name() string { return s.fields[0] }

// NumFields returns the highest field position present.
func (s *Segment) NumFields() int { return len(s.fields) - 1 }

// Modified reports whether the segment was built or changed since parsing,
// in which case Encode writes it from its fields rather than its original
// text.
func (s *Segment) Modified() bool { return s.dirty }

// Field returns the field at HL7 position n (1-based). A position beyond the
// last field gives an empty Field. In MSH, Field(1) is the field separator
// and Field(2) the encoding characters; both are returned as literal text.
func (s *Segment) Field(n int) Field {
	if n < 1 || n >= len(s.fields) {
		return Field{d: s.d}
	}
	return Field{raw: s.fields[n], d: s.d, literal: n <= 2 && s.fields[0] == "MSH"}
}

// ErrFieldText is returned by [Segment.SetField] for text that would break
// the segment structure.
var ErrFieldText = errors.New("hl7v2: field text contains a field separator or line break")

// SetField sets the encoded text of field n (n >= 1; n >= 3 in MSH), adding
// empty fields as needed. The text must not contain the field separator or a
// line break; encode values with [Delimiters.EncodeText].
func (s *Segment) SetField(n int, raw string) error {
	if n < 1 || (n <= 2 && s.fields[0] == "MSH") {
		return fmt.Errorf("hl7v2: cannot set field %d of %s", n, s.fields[0])
	}
	if strings.IndexByte(raw, s.d.Field) >= 0 || strings.ContainsAny(raw, "\r\n") {
		return ErrFieldText
	}
	s.setField(n, raw)
	return nil
}

// SetValue sets field n to a plain value, escaping it.
func (s *Segment) SetValue(n int, value string) error {
	return s.SetField(n, s.d.EncodeText(value))
}

func (s *Segment) setField(n int, raw string) {
	if n < len(s.fields) && s.fields[n] == raw {
		return
	}
	if !s.dirty {
		// The field slice may share its backing array with nothing else, but
		// the strings it holds point into the original text; both stay valid.
		s.fields = append([]string(nil), s.fields...)
	}
	for len(s.fields) <= n {
		s.fields = append(s.fields, "")
	}
	s.fields[n] = raw
	s.dirty = true
	s.raw = ""
}

// Clone returns an independent copy of the segment.
func (s *Segment) Clone() *Segment {
	c := *s
	c.fields = append([]string(nil), s.fields...)
	return &c
}

// String returns the encoded segment without its terminator.
func (s *Segment) String() string {
	if !s.dirty {
		return s.raw
	}
	return string(s.appendTo(make([]byte, 0, s.encodedLen())))
}

func (s *Segment) encodedLen() int {
	if !s.dirty {
		return len(s.raw)
	}
	n := len(s.fields[0])
	start := 1
	if s.fields[0] == "MSH" {
		start = 2
	}
	for _, f := range s.fields[min(start, len(s.fields)):] {
		n += 1 + len(f)
	}
	return n
}

func (s *Segment) appendTo(b []byte) []byte {
	if !s.dirty {
		return append(b, s.raw...)
	}
	b = append(b, s.fields[0]...)
	start := 1
	if s.fields[0] == "MSH" {
		start = 2 // MSH-1 is the separator written before MSH-2
	}
	for _, f := range s.fields[min(start, len(s.fields)):] {
		b = append(b, s.d.Field)
		b = append(b, f...)
	}
	return b
}

// Field is the encoded text of one field, with all its repetitions.
type Field struct {
	raw     string
	d       Delimiters
	literal bool // MSH-1 and MSH-2: not split, not unescaped
}

// Raw returns the encoded text.
func (f Field) Raw() string { return f.raw }

// IsEmpty reports whether the field is absent or empty.
func (f Field) IsEmpty() bool { return f.raw == "" }

// IsNull reports whether the field holds the explicit null value "" (two
// double quotes), which asks the receiver to delete a stored value.
func (f Field) IsNull() bool { return f.raw == `""` }

// String returns the decoded first subcomponent of the first component of the
// first repetition: the value of a simple field.
func (f Field) String() string {
	if f.literal {
		return f.raw
	}
	return f.Component(1).String()
}

// Reps returns the number of repetitions (0 for an empty field).
func (f Field) Reps() int {
	if f.raw == "" {
		return 0
	}
	if f.literal {
		return 1
	}
	return strings.Count(f.raw, string(f.d.Repetition)) + 1
}

// Rep returns repetition i (1-based) as a field of its own.
func (f Field) Rep(i int) Field {
	if f.literal {
		if i == 1 {
			return f
		}
		return Field{d: f.d}
	}
	return Field{raw: nth(f.raw, f.d.Repetition, i), d: f.d}
}

// Components returns the number of components of the first repetition.
func (f Field) Components() int {
	r := f.Rep(1).raw
	if r == "" {
		return 0
	}
	if f.literal {
		return 1
	}
	return strings.Count(r, string(f.d.Component)) + 1
}

// Component returns component n (1-based) of the first repetition.
func (f Field) Component(n int) Component {
	if f.literal {
		if n == 1 {
			return Component{raw: f.raw, d: f.d, literal: true}
		}
		return Component{d: f.d}
	}
	return Component{raw: nth(nth(f.raw, f.d.Repetition, 1), f.d.Component, n), d: f.d}
}

// Component is the encoded text of one component.
type Component struct {
	raw     string
	d       Delimiters
	literal bool
}

// Raw returns the encoded text.
func (c Component) Raw() string { return c.raw }

// String returns the decoded first subcomponent.
func (c Component) String() string { return c.Sub(1) }

// Subs returns the number of subcomponents.
func (c Component) Subs() int {
	if c.raw == "" {
		return 0
	}
	if c.literal {
		return 1
	}
	return strings.Count(c.raw, string(c.d.Subcomponent)) + 1
}

// Sub returns subcomponent n (1-based), decoded.
func (c Component) Sub(n int) string {
	if c.literal {
		if n == 1 {
			return c.raw
		}
		return ""
	}
	return c.d.DecodeText(nth(c.raw, c.d.Subcomponent, n))
}

// nth returns the n-th (1-based) element of s split by sep, without
// allocating; "" when there is no such element.
func nth(s string, sep byte, n int) string {
	if n < 1 {
		return ""
	}
	for ; n > 1; n-- {
		i := strings.IndexByte(s, sep)
		if i < 0 {
			return ""
		}
		s = s[i+1:]
	}
	if i := strings.IndexByte(s, sep); i >= 0 {
		return s[:i]
	}
	return s
}
