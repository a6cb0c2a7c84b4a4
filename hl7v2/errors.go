package hl7v2

import (
	"errors"
	"strconv"
	"strings"
)

// Causes of a [ParseError], for errors.Is.
var (
	ErrEmpty           = errors.New("empty message")
	ErrNoMSH           = errors.New("message does not start with an MSH segment")
	ErrDelimiters      = errors.New("MSH-1 or MSH-2 does not declare usable delimiters")
	ErrSegmentName     = errors.New("invalid segment name")
	ErrUnexpectedMSH   = errors.New("more than one MSH segment")
	ErrMessageTooLarge = errors.New("message exceeds the size limit")
	ErrTooManySegments = errors.New("message exceeds the segment limit")
	ErrTooManyFields   = errors.New("segment exceeds the field limit")
)

// ParseError describes why a message could not be parsed. It names the
// segment by position and type and the field by position only; it never
// carries message content, so it is safe to log.
type ParseError struct {
	// Segment is the 1-based position of the segment in the message, 0 when
	// the error concerns the message as a whole.
	Segment int
	// SegmentType is the three-character segment ID, empty when the segment
	// has no valid ID (an invalid ID is never copied into the error).
	SegmentType string
	// Sequence is the 1-based occurrence of this segment type in the message
	// (ERL-2), 0 when unknown.
	Sequence int
	// Field is the HL7 field position, 0 when the error is not about a field.
	Field int
	// Err is the cause, one of the Err* values of this package.
	Err error
}

// Error implements error.
func (e *ParseError) Error() string {
	var b strings.Builder
	b.WriteString("hl7v2: ")
	if e.Segment > 0 {
		b.WriteString("segment ")
		b.WriteString(strconv.Itoa(e.Segment))
		if e.SegmentType != "" {
			b.WriteString(" (")
			b.WriteString(e.SegmentType)
			b.WriteString(")")
		}
		if e.Field > 0 {
			b.WriteString(" field ")
			b.WriteString(strconv.Itoa(e.Field))
		}
		b.WriteString(": ")
	}
	if e.Err != nil {
		b.WriteString(e.Err.Error())
	} else {
		b.WriteString("parse error")
	}
	return b.String()
}

// Unwrap returns the cause.
func (e *ParseError) Unwrap() error { return e.Err }

// Location returns the error location in the form of the ERL data type
// (segment ID^sequence^field position), written with '^' as component
// separator, for ERR-2 of an acknowledgement. It is empty when the error
// concerns the message as a whole.
func (e *ParseError) Location() string {
	if e.SegmentType == "" {
		return ""
	}
	loc := e.SegmentType + "^" + strconv.Itoa(max(e.Sequence, 1))
	if e.Field > 0 {
		loc += "^" + strconv.Itoa(e.Field)
	}
	return loc
}

// Code returns the HL7 error code (HL7 v2.5.1 table 0357) that best describes
// the error, for ERR-3: 100 (segment sequence error) when the MSH segment is
// missing or repeated or a segment is not recognisable, 207 (application
// internal error) for size limits and unusable delimiters.
func (e *ParseError) Code() string {
	switch {
	case errors.Is(e.Err, ErrEmpty), errors.Is(e.Err, ErrNoMSH),
		errors.Is(e.Err, ErrUnexpectedMSH), errors.Is(e.Err, ErrSegmentName):
		return ErrCodeSegmentSequence
	default:
		return ErrCodeApplication
	}
}

// HL7 error codes (HL7 v2.5.1 table 0357, Message error condition codes) used
// in ERR-3.
const (
	ErrCodeAccepted          = "0"
	ErrCodeSegmentSequence   = "100"
	ErrCodeRequiredField     = "101"
	ErrCodeDataType          = "102"
	ErrCodeTableValue        = "103"
	ErrCodeUnsupportedType   = "200"
	ErrCodeUnsupportedEvent  = "201"
	ErrCodeUnsupportedProcID = "202"
	ErrCodeUnsupportedVer    = "203"
	ErrCodeUnknownKey        = "204"
	ErrCodeDuplicateKey      = "205"
	ErrCodeRecordLocked      = "206"
	ErrCodeApplication       = "207"
)

// errorCodeText gives the table 0357 description for ERR-3.2.
func errorCodeText(code string) string {
	switch code {
	case ErrCodeAccepted:
		return "Message accepted"
	case ErrCodeSegmentSequence:
		return "Segment sequence error"
	case ErrCodeRequiredField:
		return "Required field missing"
	case ErrCodeDataType:
		return "Data type error"
	case ErrCodeTableValue:
		return "Table value not found"
	case ErrCodeUnsupportedType:
		return "Unsupported message type"
	case ErrCodeUnsupportedEvent:
		return "Unsupported event code"
	case ErrCodeUnsupportedProcID:
		return "Unsupported processing id"
	case ErrCodeUnsupportedVer:
		return "Unsupported version id"
	case ErrCodeUnknownKey:
		return "Unknown key identifier"
	case ErrCodeDuplicateKey:
		return "Duplicate key identifier"
	case ErrCodeRecordLocked:
		return "Application record locked"
	case ErrCodeApplication:
		return "Application internal error"
	}
	return ""
}
