// Package config turns filtrate's YAML configuration into typed, validated
// values.
//
// Decoding is strict: an unknown key, a value of the wrong type and a
// duplicate key are errors. Every section starts from its defaults before its
// keys are applied, so a file needs to state only what differs from
// [Default]. String values may refer to environment variables as ${NAME}
// (for secrets kept out of the file); "$$" stands for a literal "$". A
// variable that is not set is an error.
//
// [Load] reports every problem it finds, each as an [*Error] that names the
// file, the line and the key path (for example
// "filtrate.yml:41: calibration[2].slope: must be positive"), joined with
// [errors.Join].
//
// Relative paths of TLS files and token files are resolved against the
// directory of the configuration file. The store's file path is not: it is
// relative to the working directory of the daemon.
package config

import (
	"crypto/subtle"
	"fmt"
	"os"
	"path/filepath"
	"time"

	"go.yaml.in/yaml/v3"

	"filtrate/calc"
)

// Config is filtrate's configuration. The zero value is not useful; start
// from [Default] or [Load].
type Config struct {
	// Site is a free-text name of the laboratory, used in audit records and
	// reports.
	Site string `yaml:"site"`
	// Timezone is the IANA time zone (or "Local") in which HL7 timestamps
	// without an offset, and calibration dates without a time, are read.
	Timezone string `yaml:"timezone"`
	// Store is "file:PATH" for the embedded store or a postgres:// (or
	// postgresql://) URL. See [ParseStore].
	Store string `yaml:"store"`

	HTTP  HTTPConfig  `yaml:"http"`
	HL7v2 HL7v2Config `yaml:"hl7v2"`
	FHIR  FHIRConfig  `yaml:"fhir"`
	// PolicyConfig is the "policy" section; the method Policy returns the
	// resulting calc.Policy.
	PolicyConfig PolicyConfig    `yaml:"policy"`
	Reporting    ReportingConfig `yaml:"reporting"`

	// Analytes maps local result codes to analytes, in addition to the
	// built-in LOINC codes.
	Analytes []AnalyteCode `yaml:"analytes"`
	// Calibration holds the assay calibration rules.
	Calibration []CalibrationConfig `yaml:"calibration"`

	// loc is the resolved Timezone, set by Load and Default.
	loc *time.Location
}

// HTTPConfig configures the HTTP listener (FHIR endpoints, metrics, health,
// audit view).
type HTTPConfig struct {
	// Listen is the host:port to bind. Required.
	Listen string          `yaml:"listen"`
	TLS    TLSServerConfig `yaml:"tls"`
	Auth   AuthConfig      `yaml:"auth"`
	// AllowInsecureRemote permits binding a non-loopback address without
	// TLS and authentication. Without it, doing so is a validation error.
	AllowInsecureRemote bool `yaml:"allow_insecure_remote"`
	// MaxRequestBytes bounds the size of a request body.
	MaxRequestBytes int64         `yaml:"max_request_bytes"`
	ReadTimeout     time.Duration `yaml:"read_timeout"`
	WriteTimeout    time.Duration `yaml:"write_timeout"`
	MaxConnections  int           `yaml:"max_connections"`
}

// AuthConfig lists the bearer tokens the HTTP listener accepts. Tokens are
// read when the configuration is loaded; they never appear in [Config.String]
// or [Config.Hash].
type AuthConfig struct {
	// BearerTokenFiles are files that each hold one token.
	BearerTokenFiles []string `yaml:"bearer_token_files"`
	// BearerTokenEnv are names of environment variables that each hold one
	// token.
	BearerTokenEnv []string `yaml:"bearer_token_env"`

	// tokens is behind a pointer so that printing the struct with %+v (or
	// slog) shows an address, never a token.
	tokens *[]secretToken
}

// secretToken is a token value and the key it was read from.
type secretToken struct {
	key   string
	value string
}

func (a AuthConfig) tokenList() []secretToken {
	if a.tokens == nil {
		return nil
	}
	return *a.tokens
}

// Enabled reports whether any token is configured.
func (a AuthConfig) Enabled() bool {
	return len(a.BearerTokenFiles) > 0 || len(a.BearerTokenEnv) > 0
}

// Tokens returns the tokens read at load time.
func (a AuthConfig) Tokens() []string {
	ts := a.tokenList()
	out := make([]string, len(ts))
	for i, t := range ts {
		out[i] = t.value
	}
	return out
}

// Accepts reports, in constant time per token, whether token is one of the
// configured tokens. An empty token is never accepted.
func (a AuthConfig) Accepts(token string) bool {
	if token == "" {
		return false
	}
	ok := 0
	for _, t := range a.tokenList() {
		ok |= subtle.ConstantTimeCompare([]byte(token), []byte(t.value))
	}
	return ok == 1
}

// HL7v2Config configures the MLLP listener and the downstream MLLP peer.
type HL7v2Config struct {
	// Listen is the host:port to bind; empty disables the HL7 v2 listener.
	Listen string `yaml:"listen"`
	// Forward is the host:port of the downstream MLLP peer; empty: reports
	// are not forwarded over HL7 v2.
	Forward    string          `yaml:"forward"`
	TLS        TLSServerConfig `yaml:"tls"`
	ForwardTLS TLSClientConfig `yaml:"forward_tls"`
	// AllowInsecureRemote permits binding a non-loopback address without
	// TLS and required client certificates.
	AllowInsecureRemote bool          `yaml:"allow_insecure_remote"`
	ReadTimeout         time.Duration `yaml:"read_timeout"`
	IdleTimeout         time.Duration `yaml:"idle_timeout"`
	// AckTimeout is how long the forwarder waits for the peer's ACK.
	AckTimeout     time.Duration `yaml:"ack_timeout"`
	MaxFrameBytes  int           `yaml:"max_frame_bytes"`
	MaxConnections int           `yaml:"max_connections"`
	Retry          RetryConfig   `yaml:"retry"`
}

// FHIRConfig configures FHIR forwarding and patient lookups.
type FHIRConfig struct {
	// Forward is the base URL of the downstream FHIR server; empty: none.
	Forward string `yaml:"forward"`
	// ForwardTokenFile holds the bearer token sent to Forward.
	ForwardTokenFile string `yaml:"forward_token_file"`
	// PatientSource is the FHIR base URL for Patient lookups; empty: none.
	PatientSource string `yaml:"patient_source"`
	// PatientCacheTTL is how long a looked-up Patient is reused (0: not
	// cached).
	PatientCacheTTL time.Duration `yaml:"patient_cache_ttl"`
	Retry           RetryConfig   `yaml:"retry"`

	forwardToken *string // a pointer, like AuthConfig.tokens
}

// ForwardToken returns the token read from ForwardTokenFile at load time,
// or "".
func (f FHIRConfig) ForwardToken() string {
	if f.forwardToken == nil {
		return ""
	}
	return *f.forwardToken
}

// RetryConfig is a capped exponential backoff.
type RetryConfig struct {
	Initial time.Duration `yaml:"initial"`
	Max     time.Duration `yaml:"max"`
}

// PolicyConfig chooses a preset reporting policy and overrides parts of it.
type PolicyConfig struct {
	// Preset is one of calc.PresetNames().
	Preset string `yaml:"preset"`
	// RequireTraceable refuses eGFR from an assay that no calibration rule
	// declares traceable.
	RequireTraceable bool `yaml:"require_traceable"`
	// Bands, when not empty, replace the preset's age bands.
	Bands []BandConfig `yaml:"bands"`
	// LOINC sets the output code per equation ID, over the preset's codes.
	LOINC map[string]string `yaml:"loinc"`
	// GenericLOINC codes equations without a specific code. A code other
	// than calc.GenericLOINC needs GenericLOINCName.
	GenericLOINC     string `yaml:"generic_loinc"`
	GenericLOINCName string `yaml:"generic_loinc_name"`
}

// BandConfig is one age band, [MinAge, MaxAge) in years (MaxAge 0: no upper
// bound); see calc.Band.
type BandConfig struct {
	MinAge          float64  `yaml:"min_age"`
	MaxAge          float64  `yaml:"max_age"`
	Creatinine      string   `yaml:"creatinine"`
	CystatinC       string   `yaml:"cystatin_c"`
	Combined        string   `yaml:"combined"`
	PrimaryWhenBoth string   `yaml:"primary_when_both"`
	Extra           []string `yaml:"extra"`
}

// ReportingConfig sets how values are reported.
type ReportingConfig struct {
	// Decimals is the number of decimals reported (0, 1 or 2).
	Decimals int `yaml:"decimals"`
	// CapAbove reports values above a limit as ">limit": the preset's
	// limit (default), none, or a positive number.
	CapAbove CapAbove `yaml:"cap_above"`
	// SexUnknown is "refuse" or "both"; empty means the preset's rule.
	SexUnknown string `yaml:"sex_unknown"`
	// Comments, when not empty, replace the preset's caution comments.
	Comments []string `yaml:"comments"`
	// NonIndexed adds the value in mL/min de-indexed by body surface area
	// when height and weight are known.
	NonIndexed bool `yaml:"non_indexed"`
	// BSAMethod is "dubois" or "mosteller"; empty means the preset's.
	BSAMethod string `yaml:"bsa_method"`
	// IndexClearance adds, to clearances in mL/min (timed urine,
	// Cockcroft–Gault), the value per 1.73 m² when height and weight are
	// known.
	IndexClearance bool `yaml:"index_clearance"`
}

// AnalyteCode maps a local result code to an analyte.
type AnalyteCode struct {
	Code string `yaml:"code"`
	// System is the coding system (HL7 v2 OBX-3.3 or FHIR Coding.system);
	// empty matches a code without a system.
	System  string       `yaml:"system"`
	Analyte calc.Analyte `yaml:"analyte"`
	// Unit is the unit this code reports in, used only when a message states
	// none.
	Unit string `yaml:"unit"`
}

// CalibrationConfig is one calibration rule as written in the file; see
// calc.CalibrationRule. EffectiveFrom and EffectiveTo are dates
// (YYYY-MM-DD, midnight in Timezone) or RFC 3339 times; empty is an open
// end.
type CalibrationConfig struct {
	ID            string       `yaml:"id"`
	Version       string       `yaml:"version"`
	Analyte       calc.Analyte `yaml:"analyte"`
	Method        string       `yaml:"method"`
	Instrument    string       `yaml:"instrument"`
	ReagentLot    string       `yaml:"reagent_lot"`
	EffectiveFrom string       `yaml:"effective_from"`
	EffectiveTo   string       `yaml:"effective_to"`
	Slope         float64      `yaml:"slope"`
	Intercept     float64      `yaml:"intercept"`
	Unit          string       `yaml:"unit"`
	Traceable     bool         `yaml:"traceable"`
}

func defaultRetry() RetryConfig {
	return RetryConfig{Initial: time.Second, Max: 5 * time.Minute}
}

func defaultHTTP() HTTPConfig {
	return HTTPConfig{
		Listen:          "127.0.0.1:8080",
		MaxRequestBytes: 1 << 20,
		ReadTimeout:     10 * time.Second,
		WriteTimeout:    30 * time.Second,
		MaxConnections:  256,
	}
}

func defaultHL7v2() HL7v2Config {
	return HL7v2Config{
		Listen:         "127.0.0.1:2575",
		ReadTimeout:    30 * time.Second,
		IdleTimeout:    5 * time.Minute,
		AckTimeout:     30 * time.Second,
		MaxFrameBytes:  1 << 20,
		MaxConnections: 64,
		Retry:          defaultRetry(),
	}
}

func defaultFHIR() FHIRConfig {
	return FHIRConfig{PatientCacheTTL: 5 * time.Minute, Retry: defaultRetry()}
}

func defaultPolicy() PolicyConfig {
	return PolicyConfig{Preset: "nkf-asn-2021", GenericLOINC: calc.GenericLOINC}
}

func defaultReporting() ReportingConfig {
	return ReportingConfig{SexUnknown: string(calc.SexRuleRefuse), BSAMethod: "dubois"}
}

// defaultConfig is the configuration before any key of a file is applied.
// Defaults are functions rather than package variables so that no caller
// can change them.
func defaultConfig() Config {
	return Config{
		Timezone:     "Local",
		Store:        "file:filtrate.db",
		HTTP:         defaultHTTP(),
		HL7v2:        defaultHL7v2(),
		FHIR:         defaultFHIR(),
		PolicyConfig: defaultPolicy(),
		Reporting:    defaultReporting(),
	}
}

// Default returns the configuration "filtrate serve" runs with when no file
// is given: the embedded store ./filtrate.db, HL7 v2 on 127.0.0.1:2575,
// HTTP on 127.0.0.1:8080 and the nkf-asn-2021 policy. It is the
// configuration an empty file loads to.
func Default() *Config {
	c := defaultConfig()
	c.loc = time.Local
	return &c
}

// UnmarshalYAML starts from the defaults, then applies the keys present.
func (c *Config) UnmarshalYAML(n *yaml.Node) error {
	*c = defaultConfig()
	type plain Config
	return n.Decode((*plain)(c))
}

// UnmarshalYAML starts from the defaults, then applies the keys present.
func (c *HTTPConfig) UnmarshalYAML(n *yaml.Node) error {
	*c = defaultHTTP()
	type plain HTTPConfig
	return n.Decode((*plain)(c))
}

// UnmarshalYAML starts from the defaults, then applies the keys present.
func (c *HL7v2Config) UnmarshalYAML(n *yaml.Node) error {
	*c = defaultHL7v2()
	type plain HL7v2Config
	return n.Decode((*plain)(c))
}

// UnmarshalYAML starts from the defaults, then applies the keys present.
func (c *FHIRConfig) UnmarshalYAML(n *yaml.Node) error {
	*c = defaultFHIR()
	type plain FHIRConfig
	return n.Decode((*plain)(c))
}

// UnmarshalYAML starts from the defaults, then applies the keys present.
func (c *RetryConfig) UnmarshalYAML(n *yaml.Node) error {
	*c = defaultRetry()
	type plain RetryConfig
	return n.Decode((*plain)(c))
}

// UnmarshalYAML starts from the defaults, then applies the keys present.
func (c *PolicyConfig) UnmarshalYAML(n *yaml.Node) error {
	*c = defaultPolicy()
	type plain PolicyConfig
	return n.Decode((*plain)(c))
}

// UnmarshalYAML starts from the defaults, then applies the keys present.
func (c *ReportingConfig) UnmarshalYAML(n *yaml.Node) error {
	*c = defaultReporting()
	type plain ReportingConfig
	return n.Decode((*plain)(c))
}

// LoadFile reads and loads the configuration file at path; see [Load].
func LoadFile(path string) (*Config, error) {
	data, err := os.ReadFile(path)
	if err != nil {
		return nil, fmt.Errorf("config: %w", err)
	}
	return Load(data, path)
}

// Load parses, validates and resolves a configuration. filename is used in
// error messages and as the base for relative paths of TLS and token files
// (empty: the working directory). Environment variables are read with
// os.LookupEnv; token and TLS files are read and checked.
//
// An empty document loads as [Default]. On failure Load returns nil and every
// problem found, each an [*Error], joined with [errors.Join].
func Load(data []byte, filename string) (*Config, error) {
	return load(data, filename, os.LookupEnv)
}

func load(data []byte, filename string, lookup func(string) (string, bool)) (*Config, error) {
	d := newDecoder(filename, lookup)
	c := defaultConfig()
	root, err := d.parse(data)
	if err != nil {
		return nil, err
	}
	if root != nil {
		d.check(root, configType, "")
		if err := root.Decode(&c); err != nil {
			// check has already reported and removed anything Decode
			// rejects; this is a safety net.
			d.add(root.Line, "", "%s", yamlMessage(err))
		}
	}
	dir := ""
	if filename != "" {
		dir = filepath.Dir(filename)
	}
	c.resolvePaths(dir)
	var ps problems
	c.validate(&ps)
	c.resolve(&ps, lookup)
	for _, e := range ps {
		e.File = filename
		e.Line = d.line(e.Key)
	}
	all := append(d.errs, ps...)
	if len(all) > 0 {
		return nil, all.join()
	}
	return &c, nil
}

// Location returns the resolved Timezone.
func (c *Config) Location() (*time.Location, error) {
	if c.loc != nil {
		return c.loc, nil
	}
	return loadLocation(c.Timezone)
}

func loadLocation(name string) (*time.Location, error) {
	if name == "" {
		return nil, fmt.Errorf("time zone is required (an IANA name such as Europe/Paris, or Local)")
	}
	if name == "Local" {
		return time.Local, nil
	}
	loc, err := time.LoadLocation(name)
	if err != nil {
		return nil, fmt.Errorf("unknown time zone %q", name)
	}
	return loc, nil
}

// resolvePaths makes relative file paths relative to dir.
func (c *Config) resolvePaths(dir string) {
	if dir == "" || dir == "." {
		return
	}
	join := func(p *string) {
		if *p != "" && !filepath.IsAbs(*p) {
			*p = filepath.Join(dir, *p)
		}
	}
	for _, t := range []*TLSServerConfig{&c.HTTP.TLS, &c.HL7v2.TLS} {
		join(&t.CertFile)
		join(&t.KeyFile)
		join(&t.ClientCAFile)
	}
	join(&c.HL7v2.ForwardTLS.CAFile)
	join(&c.HL7v2.ForwardTLS.CertFile)
	join(&c.HL7v2.ForwardTLS.KeyFile)
	for i := range c.HTTP.Auth.BearerTokenFiles {
		join(&c.HTTP.Auth.BearerTokenFiles[i])
	}
	join(&c.FHIR.ForwardTokenFile)
}
