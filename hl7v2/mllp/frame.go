// Package mllp carries HL7 v2 messages over TCP with the Minimal Lower Layer
// Protocol (HL7 v2.5.1 Appendix C, Lower Layer Protocols; HL7 Transport
// Specification: MLLP Release 2, "Block Format"): each message is sent as one
// frame,
//
//	<VT 0x0B> payload <FS 0x1C><CR 0x0D>
//
// and answered on the same connection by a frame holding the acknowledgement.
//
// The package knows nothing of HL7 content: a [Server] hands each payload to a
// [Handler] and writes back what the handler returns; a [Client] sends a
// payload and returns the answering payload. Both support TLS, including
// client certificates, through a *tls.Config.
//
// Errors of the client are of type *[Error], which says whether the send may
// be retried; payloads never appear in errors or log lines.
package mllp

import (
	"bufio"
	"bytes"
	"errors"
	"io"
)

// Frame bytes.
const (
	StartBlock byte = 0x0B // vertical tab: start of a frame
	EndBlock   byte = 0x1C // file separator: end of the payload
	Terminator byte = 0x0D // carriage return after EndBlock
)

// DefaultMaxFrameBytes is the payload limit used when none is configured.
const DefaultMaxFrameBytes = 8 << 20

// Framing errors.
var (
	// ErrFrameTooLarge reports a payload above the limit. ReadFrame consumes
	// the whole frame and returns its first maxBytes bytes with this error,
	// so the stream stays usable and the caller can still read the message
	// header to reject it.
	ErrFrameTooLarge = errors.New("mllp: frame exceeds the size limit")
	// ErrFraming reports bytes that do not form a frame; the stream is out
	// of step and should be closed.
	ErrFraming = errors.New("mllp: malformed frame")
)

// WriteFrame writes payload as one frame with a single Write call.
func WriteFrame(w io.Writer, payload []byte) error {
	b := make([]byte, 0, len(payload)+3)
	b = append(b, StartBlock)
	b = append(b, payload...)
	b = append(b, EndBlock, Terminator)
	_, err := w.Write(b)
	return err
}

// ReadFrame reads one frame and returns its payload. Carriage returns, line
// feeds, spaces and tabs before the start byte are skipped; any other byte
// there is a framing error. io.EOF is returned only when the stream ends
// between frames; a stream ending inside a frame gives io.ErrUnexpectedEOF.
// maxBytes <= 0 means DefaultMaxFrameBytes.
func ReadFrame(r *bufio.Reader, maxBytes int) ([]byte, error) {
	if maxBytes <= 0 {
		maxBytes = DefaultMaxFrameBytes
	}
	for {
		b, err := r.ReadByte()
		if err != nil {
			return nil, err
		}
		if b == StartBlock {
			break
		}
		switch b {
		case '\r', '\n', ' ', '\t':
			continue
		}
		return nil, ErrFraming
	}
	var payload []byte
	tooLarge := false
	for {
		chunk, err := r.ReadSlice(EndBlock)
		if len(chunk) > 0 {
			data := chunk
			if err == nil {
				data = chunk[:len(chunk)-1] // drop EndBlock
			}
			if room := maxBytes - len(payload); len(data) > room {
				data = data[:room]
				tooLarge = true
			}
			payload = append(payload, data...)
		}
		if err == bufio.ErrBufferFull {
			continue
		}
		if err != nil {
			if err == io.EOF {
				err = io.ErrUnexpectedEOF
			}
			return nil, err
		}
		break
	}
	t, err := r.ReadByte()
	if err != nil {
		if err == io.EOF {
			err = io.ErrUnexpectedEOF
		}
		return nil, err
	}
	if t != Terminator {
		return nil, ErrFraming
	}
	// A start byte inside a frame means the frame before it was cut off
	// (the sender gave up and started again): only the last frame counts,
	// so that two messages are never merged into one. The cut-off message
	// gets no answer, and its sender resends it.
	if i := bytes.LastIndexByte(payload, StartBlock); i >= 0 && !tooLarge {
		payload = payload[i+1:]
	}
	if payload == nil {
		payload = []byte{}
	}
	if tooLarge {
		return payload, ErrFrameTooLarge
	}
	return payload, nil
}
