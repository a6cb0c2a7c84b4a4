package config

import (
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"fmt"
	"net/url"
	"os"
	"strings"

	"go.yaml.in/yaml/v3"
)

// minTokenLen is the token length below which Warnings complains. Common
// practice for bearer tokens is 128 bits or more of randomness.
const minTokenLen = 16

// resolve reads what Load reads beyond the YAML: tokens (from files and the
// environment) and TLS files.
func (c *Config) resolve(ps *problems, lookup func(string) (string, bool)) {
	a := &c.HTTP.Auth
	var tokens []secretToken
	for i, f := range a.BearerTokenFiles {
		k := fmt.Sprintf("http.auth.bearer_token_files[%d]", i)
		if f == "" {
			continue // reported by validate
		}
		if tok, ok := readToken(ps, k, f); ok {
			tokens = append(tokens, secretToken{key: k, value: tok})
		}
	}
	for i, name := range a.BearerTokenEnv {
		k := fmt.Sprintf("http.auth.bearer_token_env[%d]", i)
		if !validEnvName(name) {
			continue // reported by validate
		}
		v, ok := lookup(name)
		switch tok := strings.TrimSpace(v); {
		case !ok:
			ps.add(k, "environment variable %s is not set", name)
		case tok == "":
			ps.add(k, "environment variable %s is empty", name)
		case strings.ContainsAny(tok, " \t\r\n"):
			ps.add(k, "environment variable %s must hold exactly one token (no blanks inside)", name)
		default:
			tokens = append(tokens, secretToken{key: k, value: tok})
		}
	}
	a.tokens = &tokens
	c.FHIR.forwardToken = nil
	if f := c.FHIR.ForwardTokenFile; f != "" && !ps.hasPrefix("fhir.forward_token_file") {
		if tok, ok := readToken(ps, "fhir.forward_token_file", f); ok {
			c.FHIR.forwardToken = &tok
		}
	}
	if !ps.hasPrefix("http.tls") {
		c.HTTP.TLS.checkFiles(ps, "http.tls")
	}
	if !ps.hasPrefix("hl7v2.tls") {
		c.HL7v2.TLS.checkFiles(ps, "hl7v2.tls")
	}
	if !ps.hasPrefix("hl7v2.forward_tls") {
		c.HL7v2.ForwardTLS.checkFiles(ps, "hl7v2.forward_tls")
	}
}

// readToken reads a file holding one token. Errors never contain the
// token.
func readToken(ps *problems, key, path string) (string, bool) {
	data, err := os.ReadFile(path)
	if err != nil {
		ps.addErr(key, "reading token file", err)
		return "", false
	}
	tok := strings.TrimSpace(string(data))
	switch {
	case tok == "":
		ps.add(key, "token file %s is empty", path)
		return "", false
	case strings.ContainsAny(tok, " \t\r\n"):
		ps.add(key, "token file %s must hold exactly one token (no blanks inside)", path)
		return "", false
	}
	return tok, true
}

// Warnings lists settings that are allowed but deserve an operator's
// attention, each prefixed with its key. They never contain secrets.
func (c *Config) Warnings() []string {
	var w []string
	if c.HTTP.Listen != "" && !isLoopback(c.HTTP.Listen) && !c.HTTP.secure() && c.HTTP.AllowInsecureRemote {
		w = append(w, "http.listen: binds a non-loopback address without TLS and authentication (allowed by http.allow_insecure_remote)")
	}
	if c.HTTP.Auth.Enabled() && !c.HTTP.TLS.Enabled() && !isLoopback(c.HTTP.Listen) {
		w = append(w, "http.auth: bearer tokens are sent in clear text because http.tls is not configured")
	}
	for _, t := range c.HTTP.Auth.tokenList() {
		if len(t.value) < minTokenLen {
			w = append(w, fmt.Sprintf("%s: token is shorter than %d characters", t.key, minTokenLen))
		}
	}
	if c.HL7v2.Listen != "" && !isLoopback(c.HL7v2.Listen) && !c.HL7v2.secure() && c.HL7v2.AllowInsecureRemote {
		w = append(w, "hl7v2.listen: binds a non-loopback address without TLS and client certificates (allowed by hl7v2.allow_insecure_remote)")
	}
	if c.HL7v2.Forward != "" && !c.HL7v2.ForwardTLS.Enabled && !isLoopback(c.HL7v2.Forward) {
		w = append(w, "hl7v2.forward: sends reports to a non-loopback peer without TLS (hl7v2.forward_tls.enabled is false)")
	}
	if c.HL7v2.Forward == "" && c.HL7v2.ForwardTLS.Enabled {
		w = append(w, "hl7v2.forward_tls: has no effect because hl7v2.forward is empty")
	}
	if c.HL7v2.Listen == "" {
		w = append(w, "hl7v2.listen: is empty; no HL7 v2 listener is started")
	}
	for _, u := range []struct{ key, url string }{{"fhir.forward", c.FHIR.Forward}, {"fhir.patient_source", c.FHIR.PatientSource}} {
		if strings.HasPrefix(u.url, "http://") && !isLoopbackURL(u.url) {
			w = append(w, u.key+": uses plain http:// to a non-loopback server; reports travel unencrypted")
		}
	}
	if kind, target, err := ParseStore(c.Store); err == nil && kind == StorePostgres {
		if u, err := url.Parse(target); err == nil && u.Query().Get("sslmode") == "disable" && u.Hostname() != "" && !isLoopbackURL(target) {
			w = append(w, "store: connects to a non-loopback PostgreSQL server with sslmode=disable")
		}
	}
	w = append(w, c.calibrationWarnings()...)
	return w
}

// calibrationWarnings finds pairs of rules that are equally specific and
// could both match one measurement: calc refuses such a measurement
// (calibration-ambiguous).
func (c *Config) calibrationWarnings() []string {
	loc, err := c.Location()
	if err != nil {
		return nil
	}
	var w []string
	for i, a := range c.Calibration {
		af, errAF := parseDate(a.EffectiveFrom, loc)
		at, errAT := parseDate(a.EffectiveTo, loc)
		for j := range i {
			b := c.Calibration[j]
			bf, errBF := parseDate(b.EffectiveFrom, loc)
			bt, errBT := parseDate(b.EffectiveTo, loc)
			if errAF != nil || errAT != nil || errBF != nil || errBT != nil || a.Analyte != b.Analyte {
				continue
			}
			same := a.Method == b.Method && a.Instrument == b.Instrument && a.ReagentLot == b.ReagentLot
			if same || specificity(a) != specificity(b) || !compatible(a, b) || !spansOverlap(af, at, bf, bt) {
				continue
			}
			w = append(w, fmt.Sprintf("calibration[%d]: can match the same measurements as calibration[%d] with equal specificity; such results get no eGFR (calibration-ambiguous)", i, j))
		}
	}
	return w
}

func specificity(r CalibrationConfig) int {
	n := 0
	for _, s := range []string{r.Method, r.Instrument, r.ReagentLot} {
		if s != "" {
			n++
		}
	}
	return n
}

// compatible reports whether one measurement can match both rules.
func compatible(a, b CalibrationConfig) bool {
	ok := func(x, y string) bool { return x == "" || y == "" || x == y }
	return ok(a.Method, b.Method) && ok(a.Instrument, b.Instrument) && ok(a.ReagentLot, b.ReagentLot)
}

// redacted returns a copy with passwords in URLs replaced.
func (c *Config) redacted() Config {
	cp := *c
	cp.Store = redactURL(cp.Store)
	cp.FHIR.Forward = redactURL(cp.FHIR.Forward)
	cp.FHIR.PatientSource = redactURL(cp.FHIR.PatientSource)
	return cp
}

const redactedText = "xxxxx"

// redactURL hides the password of a URL's user information and the values
// of query parameters whose name contains "password".
func redactURL(s string) string {
	if !strings.Contains(s, "://") {
		return s
	}
	u, err := url.Parse(s)
	if err != nil {
		return redactedText
	}
	if _, has := u.User.Password(); has {
		u.User = url.UserPassword(u.User.Username(), redactedText)
	}
	q := u.Query()
	changed := false
	for k := range q {
		if strings.Contains(strings.ToLower(k), "password") {
			q.Set(k, redactedText)
			changed = true
		}
	}
	if changed {
		u.RawQuery = q.Encode()
	}
	return u.String()
}

// String returns the effective configuration as YAML, with passwords in
// URLs hidden. Tokens are never part of it. The output loads back to a
// configuration with the same Hash.
func (c *Config) String() string {
	b, err := yaml.Marshal(c.redacted())
	if err != nil {
		return fmt.Sprintf("<config: %v>", err)
	}
	return string(b)
}

// hashPrefix versions the canonical encoding that Hash covers.
const hashPrefix = "filtrate-config/1\n"

// Hash returns the hex SHA-256 of a canonical encoding of the effective
// configuration: every key with its value after defaults, environment
// expansion and path resolution, so comments, key order and spelled-out
// defaults do not change it. Secrets are left out: token values are not
// part of the configuration value and URL passwords are hidden.
//
// The encoding is the configuration's YAML (as String writes it, with the
// documented key names) read back and written as JSON with object keys
// sorted and every empty value (null, "", 0, false, [], {}) left out, so an
// empty list and an absent one hash alike, and a release that adds a key
// whose default is empty does not change existing hashes. Hash returns ""
// for a Config that cannot be encoded.
func (c *Config) Hash() string {
	b, err := canonicalJSON(c.redacted())
	if err != nil {
		return ""
	}
	sum := sha256.Sum256(append([]byte(hashPrefix), b...))
	return hex.EncodeToString(sum[:])
}

func canonicalJSON(v any) ([]byte, error) {
	raw, err := yaml.Marshal(v)
	if err != nil {
		return nil, err
	}
	var tree any
	if err := yaml.Unmarshal(raw, &tree); err != nil {
		return nil, err
	}
	return json.Marshal(prune(tree)) // encoding/json sorts map keys
}

// prune removes empty values from a decoded JSON tree; it returns nil when
// v itself is empty.
func prune(v any) any {
	switch x := v.(type) {
	case map[string]any:
		for k, e := range x {
			if p := prune(e); p == nil {
				delete(x, k)
			} else {
				x[k] = p
			}
		}
		if len(x) == 0 {
			return nil
		}
		return x
	case []any:
		if len(x) == 0 {
			return nil
		}
		for i, e := range x {
			if p := prune(e); p == nil {
				x[i] = map[string]any{} // keep positions: an empty item is still an item
			} else {
				x[i] = p
			}
		}
		return x
	case string:
		if x == "" {
			return nil
		}
	case bool:
		if !x {
			return nil
		}
	case int:
		if x == 0 {
			return nil
		}
	case float64:
		if x == 0 {
			return nil
		}
	case nil:
		return nil
	}
	return v
}
