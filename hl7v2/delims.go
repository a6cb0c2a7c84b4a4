package hl7v2

import (
	"errors"
	"strings"
)

// Delimiters are the separator and escape characters a message declares in
// MSH-1 (field separator) and MSH-2 (encoding characters), HL7 v2.5.1
// chapter 2 (message construction rules).
type Delimiters struct {
	Field        byte // MSH-1, usually '|'
	Component    byte // MSH-2 position 1, usually '^'
	Repetition   byte // MSH-2 position 2, usually '~'
	Escape       byte // MSH-2 position 3, usually '\'
	Subcomponent byte // MSH-2 position 4, usually '&'
	// Truncation is MSH-2 position 5 (HL7 v2.7 and later, usually '#');
	// zero when the message declares none.
	Truncation byte
}

// DefaultDelimiters returns the delimiters HL7 recommends, |^~\&, used when a
// message has to be written without an original to copy them from.
func DefaultDelimiters() Delimiters {
	return Delimiters{Field: '|', Component: '^', Repetition: '~', Escape: '\\', Subcomponent: '&'}
}

// errDelimiters is the cause of every delimiter validation failure.
var errDelimiters = errors.New("invalid delimiters")

// Validate reports whether the delimiters can encode a message: all present,
// all different, and none of them a letter, digit, space, carriage return or
// line feed.
func (d Delimiters) Validate() error {
	set := []byte{d.Field, d.Component, d.Repetition, d.Escape, d.Subcomponent}
	if d.Truncation != 0 {
		set = append(set, d.Truncation)
	}
	for i, c := range set {
		if !validDelimiter(c) {
			return errDelimiters
		}
		for _, o := range set[:i] {
			if o == c {
				return errDelimiters
			}
		}
	}
	return nil
}

func validDelimiter(c byte) bool {
	switch {
	case c == 0, c == ' ', c == '\r', c == '\n':
		return false
	case c >= '0' && c <= '9', c >= 'A' && c <= 'Z', c >= 'a' && c <= 'z':
		return false
	case c >= 0x80:
		return false
	}
	return true
}

// EncodingCharacters returns the text of MSH-2 for these delimiters.
func (d Delimiters) EncodingCharacters() string {
	b := []byte{d.Component, d.Repetition, d.Escape, d.Subcomponent}
	if d.Truncation != 0 {
		b = append(b, d.Truncation)
	}
	return string(b)
}

// EncodeText encodes a plain value for use as field, component or subcomponent
// text: each delimiter becomes its escape sequence (\F\ \S\ \T\ \R\ \E\, and
// \P\ when a truncation character is declared), a line feed becomes the
// formatting command \.br\ and a carriage return becomes \X0D\ (HL7 v2.5.1
// chapter 2, section 2.7). DecodeText reverses it exactly.
func (d Delimiters) EncodeText(value string) string {
	n := 0
	for i := 0; i < len(value); i++ {
		if d.needsEscape(value[i]) {
			n++
		}
	}
	if n == 0 {
		return value
	}
	var b strings.Builder
	b.Grow(len(value) + 4*n)
	for i := 0; i < len(value); i++ {
		c := value[i]
		var code string
		switch {
		case c == d.Field:
			code = "F"
		case c == d.Component:
			code = "S"
		case c == d.Subcomponent:
			code = "T"
		case c == d.Repetition:
			code = "R"
		case c == d.Escape:
			code = "E"
		case d.Truncation != 0 && c == d.Truncation:
			code = "P"
		case c == '\n':
			code = ".br"
		case c == '\r':
			code = "X0D"
		default:
			b.WriteByte(c)
			continue
		}
		b.WriteByte(d.Escape)
		b.WriteString(code)
		b.WriteByte(d.Escape)
	}
	return b.String()
}

func (d Delimiters) needsEscape(c byte) bool {
	return c == d.Field || c == d.Component || c == d.Subcomponent || c == d.Repetition ||
		c == d.Escape || (d.Truncation != 0 && c == d.Truncation) || c == '\n' || c == '\r'
}

// DecodeText decodes the escape sequences of encoded text: the delimiter
// escapes \F\ \S\ \T\ \R\ \E\ (and \P\ when a truncation character is
// declared), the line break \.br\ (to a line feed) and hexadecimal data
// \Xhh..\ (to the bytes it encodes). Any other sequence (highlighting \H\ \N\,
// character set changes, other formatting commands, locally defined \Z..\)
// and an escape character without its closing partner are kept verbatim.
//
// DecodeText does not split on delimiters: call it on a single subcomponent's
// text, or use the accessors of [Field] and [Component].
func (d Delimiters) DecodeText(raw string) string {
	i := strings.IndexByte(raw, d.Escape)
	if i < 0 {
		return raw
	}
	var b strings.Builder
	b.Grow(len(raw))
	for i >= 0 {
		b.WriteString(raw[:i])
		rest := raw[i+1:]
		j := strings.IndexByte(rest, d.Escape)
		if j < 0 {
			b.WriteString(raw[i:])
			return b.String()
		}
		seq := rest[:j]
		if !d.decodeSequence(&b, seq) {
			b.WriteByte(d.Escape)
			b.WriteString(seq)
			b.WriteByte(d.Escape)
		}
		raw = rest[j+1:]
		i = strings.IndexByte(raw, d.Escape)
	}
	b.WriteString(raw)
	return b.String()
}

// decodeSequence writes the decoded form of one escape sequence (without its
// escape characters) and reports whether it was one this package decodes.
func (d Delimiters) decodeSequence(b *strings.Builder, seq string) bool {
	switch seq {
	case "F":
		b.WriteByte(d.Field)
	case "S":
		b.WriteByte(d.Component)
	case "T":
		b.WriteByte(d.Subcomponent)
	case "R":
		b.WriteByte(d.Repetition)
	case "E":
		b.WriteByte(d.Escape)
	case "P":
		if d.Truncation == 0 {
			return false
		}
		b.WriteByte(d.Truncation)
	case ".br":
		b.WriteByte('\n')
	default:
		if len(seq) < 3 || seq[0] != 'X' || len(seq)%2 == 0 {
			return false
		}
		hex := seq[1:]
		for k := 0; k < len(hex); k++ {
			if unhex(hex[k]) < 0 {
				return false
			}
		}
		for k := 0; k < len(hex); k += 2 {
			b.WriteByte(byte(unhex(hex[k])<<4 | unhex(hex[k+1])))
		}
	}
	return true
}

func unhex(c byte) int {
	switch {
	case c >= '0' && c <= '9':
		return int(c - '0')
	case c >= 'a' && c <= 'f':
		return int(c-'a') + 10
	case c >= 'A' && c <= 'F':
		return int(c-'A') + 10
	}
	return -1
}

// Components escapes each value and joins them with the component separator,
// dropping trailing empty components (HL7 v2.5.1 chapter 2 lets a sender
// omit trailing delimiters).
func (d Delimiters) Components(values ...string) string {
	return d.join(d.Component, values)
}

// Subcomponents escapes each value and joins them with the subcomponent
// separator, dropping trailing empty subcomponents.
func (d Delimiters) Subcomponents(values ...string) string {
	return d.join(d.Subcomponent, values)
}

func (d Delimiters) join(sep byte, values []string) string {
	n := len(values)
	for n > 0 && values[n-1] == "" {
		n--
	}
	var b strings.Builder
	for i, v := range values[:n] {
		if i > 0 {
			b.WriteByte(sep)
		}
		b.WriteString(d.EncodeText(v))
	}
	return b.String()
}
