package hl7v2

import (
	"errors"
	"strings"
	"time"
)

// Acknowledgment codes of HL7 v2.5.1 table 0008 used in original
// acknowledgment mode (chapter 2).
const (
	AckAccept = "AA" // application accept
	AckError  = "AE" // application error: the sender may correct and resend
	AckReject = "AR" // application reject: do not resend unchanged
)

// Error severities of HL7 v2.5.1 table 0516, for ERR-4.
const (
	SeverityError       = "E"
	SeverityWarning     = "W"
	SeverityInformation = "I"
)

// ErrorDetail is what an ERR segment reports.
type ErrorDetail struct {
	// Code is the HL7 error code of table 0357 for ERR-3; default
	// ErrCodeApplication (207).
	Code string
	// Location is the error location (ERL data type) for ERR-2, written with
	// '^' between its components, e.g. "PID^1^7"; see [ParseError.Location].
	Location string
	// Text is a human-readable explanation for ERR-8 (user message) and
	// MSA-3. It must not contain patient data.
	Text string
	// Severity is ERR-4 from table 0516; default SeverityError.
	Severity string
}

// BuildACK builds an original-mode acknowledgement (HL7 v2.5.1 chapter 2)
// of orig; see [BuildACKDetail]. For AE and AR the ERR
// segment carries HL7 error code 207 (application internal error).
func BuildACK(orig *Message, code, errText, errLoc, controlID string, now time.Time) *Message {
	return BuildACKDetail(orig, code, ErrorDetail{Text: errText, Location: errLoc}, controlID, now)
}

// BuildACKDetail builds an original-mode acknowledgement of orig:
//
//	MSH  sender and receiver of orig swapped (MSH-3..6), MSH-7 now,
//	     MSH-9 ACK^<orig trigger>^ACK, MSH-10 controlID, MSH-11 and
//	     MSH-12 copied from orig (default P and 2.5.1)
//	MSA  MSA-1 code, MSA-2 the control ID of orig, MSA-3 the error text
//	ERR  (AE and AR only) ERR-2 location, ERR-3 code^text^HL70357,
//	     ERR-4 severity, ERR-8 the error text
//
// orig may be nil when the message has no usable MSH: the acknowledgement
// then uses the default delimiters and leaves the addressing fields and MSA-2
// empty. It otherwise uses the delimiters of orig. A code other than AA, AE
// or AR is sent as AR.
func BuildACKDetail(orig *Message, code string, e ErrorDetail, controlID string, now time.Time) *Message {
	d := DefaultDelimiters()
	var oh *Segment
	if orig != nil && len(orig.segments) > 0 {
		d = orig.d
		oh = orig.MSH()
	}
	if code != AckAccept && code != AckError {
		code = AckReject
	}
	raw := func(n int) string {
		if oh == nil {
			return ""
		}
		return oh.Field(n).Raw()
	}
	msgType := "ACK"
	if oh != nil {
		if ev := oh.Field(9).Component(2).Raw(); ev != "" {
			msgType = "ACK" + string(d.Component) + ev + string(d.Component) + "ACK"
		}
	}
	procID, version := raw(11), raw(12)
	if procID == "" {
		procID = "P"
	}
	if version == "" {
		version = "2.5.1"
	}
	msh := NewSegment(d, "MSH",
		raw(5), raw(6), raw(3), raw(4), // MSH-3..6: receiver becomes sender
		FormatDTM(now), "", msgType, d.EncodeText(controlID), procID, version)
	msa := NewSegment(d, "MSA", code, raw(10), d.EncodeText(e.Text))
	trimTrailing(msa)
	ack := &Message{d: d, segments: []*Segment{msh, msa}}
	if code != AckAccept {
		errCode := e.Code
		if errCode == "" {
			errCode = ErrCodeApplication
		}
		sev := e.Severity
		if sev == "" {
			sev = SeverityError
		}
		var loc string
		if e.Location != "" {
			loc = d.Components(strings.Split(e.Location, "^")...)
		}
		errSeg := NewSegment(d, "ERR",
			"", loc, d.Components(errCode, errorCodeText(errCode), "HL70357"), d.EncodeText(sev),
			"", "", "", d.EncodeText(e.Text))
		trimTrailing(errSeg)
		ack.segments = append(ack.segments, errSeg)
	}
	return ack
}

// trimTrailing drops trailing empty fields of a built segment.
func trimTrailing(s *Segment) {
	for len(s.fields) > 2 && s.fields[len(s.fields)-1] == "" {
		s.fields = s.fields[:len(s.fields)-1]
	}
}

// Ack is what an acknowledgement says.
type Ack struct {
	// Code is MSA-1: AA, AE or AR (or CA, CE, CR in enhanced mode).
	Code string
	// ControlID is MSA-2, the control ID of the acknowledged message.
	ControlID string
	// Text is MSA-3, or ERR-8 when MSA-3 is empty. It comes from the peer and
	// may contain anything: do not log it.
	Text string
	// ErrorCode is ERR-3.1, the HL7 error code (table 0357), if any.
	ErrorCode string
}

// Accepted reports whether the peer accepted the message (AA or CA).
func (a Ack) Accepted() bool { return a.Code == AckAccept || a.Code == "CA" }

// Errors returned by ParseACK besides *ParseError.
var (
	ErrNoMSA   = errors.New("hl7v2: acknowledgement has no MSA segment")
	ErrAckCode = errors.New("hl7v2: acknowledgement code is not in table 0008")
)

// ParseACK reads the acknowledgement code, the acknowledged control ID and
// the error text of an acknowledgement message.
func ParseACK(data []byte) (Ack, error) {
	m, err := Parse(data)
	if err != nil {
		return Ack{}, err
	}
	msa := m.First("MSA")
	if msa == nil {
		return Ack{}, ErrNoMSA
	}
	a := Ack{
		Code:      msa.Field(1).String(),
		ControlID: msa.Field(2).String(),
		Text:      msa.Field(3).String(),
	}
	if e := m.First("ERR"); e != nil {
		a.ErrorCode = e.Field(3).String()
		if a.Text == "" {
			a.Text = e.Field(8).String()
		}
	}
	switch a.Code {
	case "AA", "AE", "AR", "CA", "CE", "CR":
		return a, nil
	}
	return a, ErrAckCode
}
