package hl7v2

import "bytes"

// SplitMessages splits a file holding one or more messages into messages:
// each MSH segment at the start of a line starts a new message. Line ends may
// be \r, \n or \r\n; each message is returned with \r segment terminators
// and without blank lines. A file with no MSH yields its non-blank content as
// one message (which the parser will then refuse with a clear error).
func SplitMessages(data []byte) [][]byte {
	data = bytes.ReplaceAll(data, []byte("\r\n"), []byte("\r"))
	data = bytes.ReplaceAll(data, []byte("\n"), []byte("\r"))
	var msgs [][]byte
	var cur []byte
	for _, line := range bytes.Split(data, []byte("\r")) {
		if len(bytes.TrimSpace(line)) == 0 {
			continue
		}
		if bytes.HasPrefix(line, []byte("MSH")) && len(cur) > 0 {
			msgs = append(msgs, cur)
			cur = nil
		}
		cur = append(cur, line...)
		cur = append(cur, '\r')
	}
	if len(cur) > 0 {
		msgs = append(msgs, cur)
	}
	return msgs
}
