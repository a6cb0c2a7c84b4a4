package config

import (
	"fmt"
	"math"
	"net"
	"net/url"
	"strconv"
	"strings"
	"time"

	"filtrate/calc"
)

// Store kinds returned by [ParseStore].
const (
	StoreFile     = "file"
	StorePostgres = "postgres"
)

// ParseStore splits a store setting into its kind ([StoreFile] or
// [StorePostgres]) and target: the file path, or the PostgreSQL URL as
// written. Errors never repeat the setting, which may hold a password.
func ParseStore(s string) (kind, target string, err error) {
	switch {
	case strings.HasPrefix(s, "file:"):
		p := strings.TrimPrefix(s, "file:")
		if strings.TrimSpace(p) == "" {
			return "", "", fmt.Errorf("file: needs a path, as in file:filtrate.db")
		}
		return StoreFile, p, nil
	case strings.HasPrefix(s, "postgres://"), strings.HasPrefix(s, "postgresql://"):
		if _, err := url.Parse(s); err != nil {
			return "", "", fmt.Errorf("not a valid postgres:// URL")
		}
		return StorePostgres, s, nil
	case s == "":
		return "", "", fmt.Errorf("is required (file:PATH or a postgres:// URL)")
	}
	scheme, _, ok := strings.Cut(s, ":")
	if !ok || strings.ContainsAny(scheme, "/@ ") {
		return "", "", fmt.Errorf("must be file:PATH or a postgres:// URL")
	}
	return "", "", fmt.Errorf("unsupported scheme %q (use file:PATH or a postgres:// URL)", scheme)
}

// Validate checks the configuration without touching the file system or
// the environment (Load also reads and checks token and TLS files). It
// returns every problem found, each an [*Error] naming the key, joined with
// errors.Join.
func (c *Config) Validate() error {
	var ps problems
	c.validate(&ps)
	if len(ps) == 0 {
		return nil
	}
	return ps.join()
}

func (c *Config) validate(ps *problems) {
	loc, err := loadLocation(c.Timezone)
	if err != nil {
		ps.add("timezone", "%v", err)
	} else {
		c.loc = loc
	}
	if _, _, err := ParseStore(c.Store); err != nil {
		ps.add("store", "%v", err)
	}
	c.HTTP.validate(ps, "http")
	c.HL7v2.validate(ps, "hl7v2")
	c.FHIR.validate(ps, "fhir")
	c.PolicyConfig.validate(ps, "policy")
	c.Reporting.validate(ps, "reporting")
	validateAnalytes(ps, c.Analytes)
	validateCalibrations(ps, c.Calibration, loc)
	if !ps.hasPrefix("policy", "reporting") {
		if _, err := c.Policy(); err != nil {
			ps.add("policy", "%v", err)
		}
	}
}

func (h *HTTPConfig) validate(ps *problems, key string) {
	listenOK := false
	if h.Listen == "" {
		ps.add(key+".listen", "is required (host:port)")
	} else if err := checkHostPort(h.Listen, 0); err != nil {
		ps.add(key+".listen", "%v", err)
	} else {
		listenOK = true
	}
	h.TLS.validate(ps, key+".tls")
	for i, f := range h.Auth.BearerTokenFiles {
		if f == "" {
			ps.add(fmt.Sprintf("%s.auth.bearer_token_files[%d]", key, i), "must be a file path")
		}
	}
	for i, name := range h.Auth.BearerTokenEnv {
		if !validEnvName(name) {
			ps.add(fmt.Sprintf("%s.auth.bearer_token_env[%d]", key, i), "must be an environment variable name, not %q", name)
		}
	}
	positive(ps, key+".max_request_bytes", h.MaxRequestBytes)
	positive(ps, key+".read_timeout", h.ReadTimeout)
	positive(ps, key+".write_timeout", h.WriteTimeout)
	positive(ps, key+".max_connections", h.MaxConnections)
	if listenOK && !isLoopback(h.Listen) && !h.secure() && !h.AllowInsecureRemote {
		ps.add(key+".listen", "binds non-loopback address %q without TLS and authentication; configure %s.tls and %s.auth (or required client certificates), or set %s.allow_insecure_remote: true", h.Listen, key, key, key)
	}
}

// secure reports whether the listener uses TLS and authenticates clients
// (bearer tokens or required client certificates).
func (h *HTTPConfig) secure() bool {
	return h.TLS.Enabled() && (h.Auth.Enabled() || h.TLS.RequireClientCert)
}

func (h *HL7v2Config) validate(ps *problems, key string) {
	listenOK := false
	if h.Listen != "" {
		if err := checkHostPort(h.Listen, 0); err != nil {
			ps.add(key+".listen", "%v", err)
		} else {
			listenOK = true
		}
	}
	if h.Forward != "" {
		if err := checkHostPort(h.Forward, 1); err != nil {
			ps.add(key+".forward", "%v", err)
		}
	}
	h.TLS.validate(ps, key+".tls")
	h.ForwardTLS.validate(ps, key+".forward_tls")
	positive(ps, key+".read_timeout", h.ReadTimeout)
	positive(ps, key+".idle_timeout", h.IdleTimeout)
	positive(ps, key+".ack_timeout", h.AckTimeout)
	positive(ps, key+".max_frame_bytes", h.MaxFrameBytes)
	positive(ps, key+".max_connections", h.MaxConnections)
	h.Retry.validate(ps, key+".retry")
	if listenOK && !isLoopback(h.Listen) && !h.secure() && !h.AllowInsecureRemote {
		ps.add(key+".listen", "binds non-loopback address %q without TLS and required client certificates; configure %s.tls (cert_file, key_file, client_ca_file, require_client_cert: true), or set %s.allow_insecure_remote: true", h.Listen, key, key)
	}
}

// secure reports whether the MLLP listener uses TLS and requires client
// certificates (the only authentication MLLP has).
func (h *HL7v2Config) secure() bool {
	return h.TLS.Enabled() && h.TLS.RequireClientCert
}

func (f *FHIRConfig) validate(ps *problems, key string) {
	checkURL(ps, key+".forward", f.Forward)
	checkURL(ps, key+".patient_source", f.PatientSource)
	if f.ForwardTokenFile != "" {
		switch {
		case f.Forward == "":
			ps.add(key+".forward_token_file", "is set but %s.forward is empty", key)
		case strings.HasPrefix(f.Forward, "http://") && !isLoopbackURL(f.Forward):
			ps.add(key+".forward_token_file", "the token would be sent in clear text: %s.forward must use https:// for a non-loopback server", key)
		}
	}
	if f.PatientCacheTTL < 0 {
		ps.add(key+".patient_cache_ttl", "must not be negative")
	}
	f.Retry.validate(ps, key+".retry")
}

func (r *RetryConfig) validate(ps *problems, key string) {
	positive(ps, key+".initial", r.Initial)
	positive(ps, key+".max", r.Max)
	if r.Initial > 0 && r.Max > 0 && r.Max < r.Initial {
		ps.add(key+".max", "must not be less than %s.initial", key)
	}
}

func (p *PolicyConfig) validate(ps *problems, key string) {
	if _, err := calc.Preset(p.Preset); err != nil {
		ps.add(key+".preset", "unknown preset %q (known: %s)", p.Preset, strings.Join(calc.PresetNames(), ", "))
	}
	reg := calc.Builtin()
	known := func(k, id string) {
		if _, ok := reg.Latest(id); !ok {
			ps.add(k, "unknown equation %q (known: %s)", id, strings.Join(reg.IDs(), ", "))
		}
	}
	for i, b := range p.Bands {
		k := fmt.Sprintf("%s.bands[%d]", key, i)
		if !finite(b.MinAge) || b.MinAge < 0 {
			ps.add(k+".min_age", "must be a number not below 0")
		}
		if !finite(b.MaxAge) || (b.MaxAge != 0 && b.MaxAge <= b.MinAge) {
			ps.add(k+".max_age", "must exceed min_age (or be 0: no upper bound)")
		}
		if b.Creatinine == "" && b.CystatinC == "" && b.Combined == "" {
			ps.add(k, "names no equation (set creatinine, cystatin_c or combined)")
		}
		for _, f := range []struct{ name, id string }{
			{"creatinine", b.Creatinine}, {"cystatin_c", b.CystatinC},
			{"combined", b.Combined}, {"primary_when_both", b.PrimaryWhenBoth},
		} {
			if f.id != "" {
				known(k+"."+f.name, f.id)
			}
		}
		if b.PrimaryWhenBoth != "" && b.PrimaryWhenBoth != b.Creatinine && b.PrimaryWhenBoth != b.CystatinC && b.PrimaryWhenBoth != b.Combined {
			ps.add(k+".primary_when_both", "must be one of the band's creatinine, cystatin_c or combined equations")
		}
		for j, id := range b.Extra {
			known(fmt.Sprintf("%s.extra[%d]", k, j), id)
		}
		for j, o := range p.Bands[:i] {
			if bandsOverlap(b, o) {
				ps.add(k, "overlaps %s.bands[%d]", key, j)
			}
		}
	}
	for _, id := range sortedKeys(p.LOINC) {
		k := key + ".loinc." + id
		known(k, id)
		if !ValidLOINC(p.LOINC[id]) {
			ps.add(k, "%q is not a LOINC code (digits, a hyphen and a valid check digit, as in 98979-8)", p.LOINC[id])
		}
	}
	switch {
	case p.GenericLOINC == "":
		ps.add(key+".generic_loinc", "is required")
	case !ValidLOINC(p.GenericLOINC):
		ps.add(key+".generic_loinc", "%q is not a LOINC code (digits, a hyphen and a valid check digit, as in %s)", p.GenericLOINC, calc.GenericLOINC)
	case p.GenericLOINC != calc.GenericLOINC && p.GenericLOINCName == "":
		ps.add(key+".generic_loinc_name", "is required when generic_loinc is not %s", calc.GenericLOINC)
	}
}

func bandsOverlap(a, b BandConfig) bool {
	aMax, bMax := a.MaxAge, b.MaxAge
	if aMax == 0 {
		aMax = math.Inf(1)
	}
	if bMax == 0 {
		bMax = math.Inf(1)
	}
	return a.MinAge < bMax && b.MinAge < aMax
}

func (r *ReportingConfig) validate(ps *problems, key string) {
	if r.Decimals < 0 || r.Decimals > 2 {
		ps.add(key+".decimals", "must be 0, 1 or 2")
	}
	if err := r.CapAbove.validate(); err != nil {
		ps.add(key+".cap_above", "%v", err)
	}
	switch calc.SexRule(r.SexUnknown) {
	case "", calc.SexRuleRefuse, calc.SexRuleBoth:
	default:
		ps.add(key+".sex_unknown", "must be %q or %q, not %q", calc.SexRuleRefuse, calc.SexRuleBoth, r.SexUnknown)
	}
	for i, s := range r.Comments {
		if strings.TrimSpace(s) == "" {
			ps.add(fmt.Sprintf("%s.comments[%d]", key, i), "must not be empty")
		}
	}
	switch r.BSAMethod {
	case "", "dubois", "mosteller":
	default:
		ps.add(key+".bsa_method", "must be dubois or mosteller, not %q", r.BSAMethod)
	}
}

func validateAnalytes(ps *problems, as []AnalyteCode) {
	seen := map[[2]string]int{}
	for i, a := range as {
		k := fmt.Sprintf("analytes[%d]", i)
		if a.Code == "" {
			ps.add(k+".code", "is required")
		}
		unitOK := true
		if calc.CanonicalUnit(a.Analyte) == "" {
			ps.add(k+".analyte", "unknown analyte %q (known: %s)", a.Analyte, strings.Join(analyteNames(), ", "))
			unitOK = false
		}
		if unitOK && a.Unit != "" && !calc.KnownUnit(a.Analyte, a.Unit) {
			ps.add(k+".unit", "unit %q is not accepted for %s", a.Unit, a.Analyte)
		}
		id := [2]string{a.System, a.Code}
		if j, dup := seen[id]; dup && a.Code != "" {
			ps.add(k+".code", "code %q (system %q) is already mapped by analytes[%d]", a.Code, a.System, j)
		} else {
			seen[id] = i
		}
	}
}

// analyteNames lists the analytes calc knows.
func analyteNames() []string {
	return []string{
		string(calc.Creatinine), string(calc.CystatinC), string(calc.Height), string(calc.Weight),
		string(calc.UrineCreatinine), string(calc.UrineVolume), string(calc.CollectionTime),
	}
}

func validateCalibrations(ps *problems, cs []CalibrationConfig, loc *time.Location) {
	type span struct {
		ok       bool
		from, to time.Time
	}
	spans := make([]span, len(cs))
	ids := map[[2]string]int{}
	for i, c := range cs {
		k := fmt.Sprintf("calibration[%d]", i)
		if c.ID == "" {
			ps.add(k+".id", "is required")
		}
		if c.Version == "" {
			ps.add(k+".version", "is required")
		}
		if j, dup := ids[[2]string{c.ID, c.Version}]; dup && c.ID != "" && c.Version != "" {
			ps.add(k+".id", "rule %q version %q is already defined by calibration[%d]", c.ID, c.Version, j)
		} else {
			ids[[2]string{c.ID, c.Version}] = i
		}
		analyteOK := false
		switch {
		case c.Analyte == calc.Creatinine || c.Analyte == calc.CystatinC:
			analyteOK = true
		case calc.CanonicalUnit(c.Analyte) != "":
			ps.add(k+".analyte", "calibration applies only to %s and %s, not %s", calc.Creatinine, calc.CystatinC, c.Analyte)
		default:
			ps.add(k+".analyte", "unknown analyte %q (calibration applies to %s and %s)", c.Analyte, calc.Creatinine, calc.CystatinC)
		}
		switch {
		case c.Unit == "":
			ps.add(k+".unit", "is required (the unit in which slope and intercept apply)")
		case analyteOK && !calc.KnownUnit(c.Analyte, c.Unit):
			ps.add(k+".unit", "unit %q is not accepted for %s", c.Unit, c.Analyte)
		}
		if !finite(c.Slope) || !(c.Slope > 0) {
			ps.add(k+".slope", "must be positive")
		}
		if !finite(c.Intercept) {
			ps.add(k+".intercept", "must be a finite number")
		}
		sp := span{ok: true}
		if loc != nil {
			var err error
			if sp.from, err = parseDate(c.EffectiveFrom, loc); err != nil {
				ps.add(k+".effective_from", "%v", err)
				sp.ok = false
			}
			if sp.to, err = parseDate(c.EffectiveTo, loc); err != nil {
				ps.add(k+".effective_to", "%v", err)
				sp.ok = false
			}
			if sp.ok && !sp.to.IsZero() && !sp.to.After(sp.from) {
				ps.add(k+".effective_to", "must be after effective_from")
				sp.ok = false
			}
		} else {
			sp.ok = false
		}
		spans[i] = sp
		if !sp.ok {
			continue
		}
		if !ps.hasPrefix(k) {
			// Guard: calc's own check must agree with the ones above.
			r := calc.CalibrationRule{
				ID: c.ID, Version: c.Version, Analyte: c.Analyte, Unit: c.Unit,
				Slope: c.Slope, Intercept: c.Intercept, EffectiveFrom: sp.from, EffectiveTo: sp.to,
			}
			if err := r.Validate(); err != nil {
				ps.add(k, "%v", err)
			}
		}
		for j := range i {
			o := cs[j]
			if spans[j].ok && o.Analyte == c.Analyte && o.Method == c.Method && o.Instrument == c.Instrument &&
				o.ReagentLot == c.ReagentLot && spansOverlap(sp.from, sp.to, spans[j].from, spans[j].to) {
				ps.add(k, "effective dates overlap calibration[%d], a rule for the same analyte, method, instrument and reagent_lot", j)
			}
		}
	}
}

// spansOverlap reports whether [af, at) and [bf, bt) overlap; zero times
// are open ends.
func spansOverlap(af, at, bf, bt time.Time) bool {
	before := func(x, y time.Time) bool { // x < y, zero x = -inf, zero y = +inf
		return x.IsZero() || y.IsZero() || x.Before(y)
	}
	return before(af, bt) && before(bf, at)
}

// parseDate reads YYYY-MM-DD (midnight in loc) or an RFC 3339 time; "" is
// the zero time.
func parseDate(s string, loc *time.Location) (time.Time, error) {
	if s == "" {
		return time.Time{}, nil
	}
	if t, err := time.ParseInLocation(time.DateOnly, s, loc); err == nil {
		return t, nil
	}
	if t, err := time.Parse(time.RFC3339, s); err == nil {
		return t, nil
	}
	return time.Time{}, fmt.Errorf("%q is not a date (YYYY-MM-DD) or an RFC 3339 time", s)
}

func positive[T int | int64 | time.Duration](ps *problems, key string, v T) {
	if v <= 0 {
		ps.add(key, "must be positive")
	}
}

func finite(f float64) bool { return !math.IsNaN(f) && !math.IsInf(f, 0) }

// checkHostPort checks host:port with a numeric port of at least minPort.
func checkHostPort(s string, minPort int) error {
	host, port, err := net.SplitHostPort(s)
	if err != nil {
		return fmt.Errorf("%q is not host:port", s)
	}
	if strings.ContainsAny(host, "/@ ") {
		return fmt.Errorf("%q is not host:port (no scheme or path)", s)
	}
	if minPort > 0 && host == "" {
		return fmt.Errorf("%q needs a host", s)
	}
	n, err := strconv.Atoi(port)
	if err != nil || n < minPort || n > 65535 {
		return fmt.Errorf("%q: port must be a number from %d to 65535", s, minPort)
	}
	return nil
}

// isLoopback reports whether a host:port binds only the loopback interface.
// An empty host (all interfaces) and names other than localhost are not
// loopback.
func isLoopback(hostport string) bool {
	host, _, err := net.SplitHostPort(hostport)
	if err != nil {
		return false
	}
	if strings.EqualFold(host, "localhost") {
		return true
	}
	ip := net.ParseIP(host)
	return ip != nil && ip.IsLoopback()
}

func isLoopbackURL(s string) bool {
	u, err := url.Parse(s)
	if err != nil {
		return false
	}
	return isLoopback(net.JoinHostPort(u.Hostname(), "0"))
}

// checkURL checks an optional FHIR base URL.
func checkURL(ps *problems, key, s string) {
	if s == "" {
		return
	}
	u, err := url.Parse(s)
	switch {
	case err != nil:
		ps.add(key, "is not a valid URL")
	case u.Scheme != "http" && u.Scheme != "https":
		ps.add(key, "must be an http:// or https:// URL")
	case u.Host == "":
		ps.add(key, "must name a host")
	case u.User != nil:
		ps.add(key, "must not contain credentials; use a token file")
	case u.RawQuery != "" || u.Fragment != "":
		ps.add(key, "must be a base URL without query or fragment")
	}
}
