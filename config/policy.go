package config

import (
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"maps"
	"slices"
	"strconv"
	"strings"

	"go.yaml.in/yaml/v3"

	"filtrate/calc"
)

// CapAbove is reporting.cap_above. Its zero value keeps the preset's cap
// (in YAML: absent, or "preset"); None reports every value uncapped (in
// YAML: "none"); a positive Value reports values above it as ">Value" (in
// YAML: the number). "0" is refused as ambiguous: write preset or none.
type CapAbove struct {
	None  bool
	Value float64
}

func (*CapAbove) scalarYAML() {}

// String returns "preset", "none" or the number.
func (c CapAbove) String() string {
	switch {
	case c.None:
		return "none"
	case c.Value == 0:
		return "preset"
	default:
		return strconv.FormatFloat(c.Value, 'g', -1, 64)
	}
}

// UnmarshalYAML reads preset, none or a positive number.
func (c *CapAbove) UnmarshalYAML(n *yaml.Node) error {
	if n.Kind != yaml.ScalarNode {
		return errors.New("must be preset, none or a positive number")
	}
	switch n.Value {
	case "preset":
		*c = CapAbove{}
		return nil
	case "none":
		*c = CapAbove{None: true}
		return nil
	}
	if tag := n.ShortTag(); tag != "!!int" && tag != "!!float" {
		return fmt.Errorf("must be preset, none or a positive number, not %q", n.Value)
	}
	var v float64
	if err := n.Decode(&v); err != nil {
		return err
	}
	if v == 0 {
		return errors.New("0 is ambiguous: write preset to keep the preset's cap, or none for no cap")
	}
	*c = CapAbove{Value: v}
	return c.validate()
}

// MarshalYAML writes preset, none or the number.
func (c CapAbove) MarshalYAML() (any, error) {
	if c.None || c.Value == 0 {
		return c.String(), nil
	}
	return c.Value, nil
}

func (c CapAbove) validate() error {
	switch {
	case c.None && c.Value != 0:
		return errors.New("cannot be none and a number at once")
	case !finite(c.Value) || c.Value < 0:
		return errors.New("must be preset, none or a positive number")
	}
	return nil
}

// ValidLOINC reports whether s is a LOINC code: one to seven digits, a
// hyphen, and the Mod 10 check digit of the LOINC Users' Guide (Appendix C,
// "Calculating Mod 10 Check Digits").
func ValidLOINC(s string) bool {
	num, check, ok := strings.Cut(s, "-")
	if !ok || len(num) == 0 || len(num) > 7 || len(check) != 1 {
		return false
	}
	for _, r := range num + check {
		if r < '0' || r > '9' {
			return false
		}
	}
	return loincCheckDigit(num) == check[0]-'0'
}

// loincCheckDigit follows the Users' Guide steps: double the number formed
// by the digits in odd positions from the right, prepend the digits in even
// positions, sum all digits, and take the distance up to the next multiple
// of ten.
func loincCheckDigit(num string) byte {
	var odd, even strings.Builder
	for i := len(num) - 1; i >= 0; i-- {
		if (len(num)-1-i)%2 == 0 {
			odd.WriteByte(num[i])
		} else {
			even.WriteByte(num[i])
		}
	}
	o, _ := strconv.ParseUint(odd.String(), 10, 64)
	sum := 0
	for _, r := range even.String() + strconv.FormatUint(2*o, 10) {
		sum += int(r - '0')
	}
	return byte((10 - sum%10) % 10)
}

// Policy returns the preset named by policy.preset with the policy and
// reporting overrides applied, validated against calc.Builtin(). When any
// override changes the preset, the version becomes
// "<preset version>+local.<12 hex digits>" (from a hash of the resulting
// policy), so that a locally changed policy is never reported under the
// preset's own name and version alone.
func (c *Config) Policy() (calc.Policy, error) {
	preset, err := calc.Preset(c.PolicyConfig.Preset)
	if err != nil {
		return calc.Policy{}, fmt.Errorf("config: %w", err)
	}
	p := preset
	p.Bands = slices.Clone(preset.Bands)
	p.Cautions = slices.Clone(preset.Cautions)
	p.LOINC = maps.Clone(preset.LOINC)

	p.RequireTraceable = c.PolicyConfig.RequireTraceable
	if len(c.PolicyConfig.Bands) > 0 {
		p.Bands = make([]calc.Band, len(c.PolicyConfig.Bands))
		for i, b := range c.PolicyConfig.Bands {
			p.Bands[i] = calc.Band{
				MinAge: b.MinAge, MaxAge: b.MaxAge,
				Creatinine: b.Creatinine, CystatinC: b.CystatinC, Combined: b.Combined,
				PrimaryWhenBoth: b.PrimaryWhenBoth, Extra: slices.Clone(b.Extra),
			}
		}
	}
	if len(c.PolicyConfig.LOINC) > 0 {
		if p.LOINC == nil {
			p.LOINC = map[string]string{}
		}
		maps.Copy(p.LOINC, c.PolicyConfig.LOINC)
	}
	if g := c.PolicyConfig.GenericLOINC; g != "" && g != p.GenericLOINC {
		p.GenericLOINC, p.GenericLOINCName = g, c.PolicyConfig.GenericLOINCName
	} else if g != "" && c.PolicyConfig.GenericLOINCName != "" {
		p.GenericLOINCName = c.PolicyConfig.GenericLOINCName
	}

	r := c.Reporting
	if err := r.CapAbove.validate(); err != nil {
		return calc.Policy{}, fmt.Errorf("config: reporting.cap_above: %w", err)
	}
	p.Decimals = r.Decimals
	switch {
	case r.CapAbove.None:
		p.CapAbove = 0
	case r.CapAbove.Value > 0:
		p.CapAbove = r.CapAbove.Value
	}
	if r.SexUnknown != "" {
		p.SexUnknown = calc.SexRule(r.SexUnknown)
	}
	if len(r.Comments) > 0 {
		p.Cautions = slices.Clone(r.Comments)
	}
	p.NonIndexed = r.NonIndexed
	p.IndexClearance = r.IndexClearance
	if r.BSAMethod != "" {
		p.BSAMethod = r.BSAMethod
	}

	if err := p.Validate(calc.Builtin()); err != nil {
		return calc.Policy{}, fmt.Errorf("config: %w", err)
	}
	a, errA := json.Marshal(preset)
	b, errB := json.Marshal(p)
	if errA != nil || errB != nil {
		return calc.Policy{}, fmt.Errorf("config: encoding policy: %w", errors.Join(errA, errB))
	}
	if string(a) != string(b) {
		sum := sha256.Sum256(b)
		p.Version = preset.Version + "+local." + hex.EncodeToString(sum[:6])
	}
	return p, nil
}

// Calibrations returns the calibration rules as calc uses them, dates
// resolved in Timezone. Load only returns configurations whose rules are
// valid; on a Config built in code, call Validate first: a rule whose dates
// do not parse is left out here.
func (c *Config) Calibrations() []calc.CalibrationRule {
	loc, err := c.Location()
	if err != nil {
		return nil
	}
	out := make([]calc.CalibrationRule, 0, len(c.Calibration))
	for _, cc := range c.Calibration {
		from, errF := parseDate(cc.EffectiveFrom, loc)
		to, errT := parseDate(cc.EffectiveTo, loc)
		if errF != nil || errT != nil {
			continue
		}
		out = append(out, calc.CalibrationRule{
			ID: cc.ID, Version: cc.Version, Analyte: cc.Analyte,
			Method: cc.Method, Instrument: cc.Instrument, ReagentLot: cc.ReagentLot,
			EffectiveFrom: from, EffectiveTo: to,
			Slope: cc.Slope, Intercept: cc.Intercept, Unit: cc.Unit, Traceable: cc.Traceable,
		})
	}
	return out
}

func sortedKeys[V any](m map[string]V) []string {
	return slices.Sorted(maps.Keys(m))
}
