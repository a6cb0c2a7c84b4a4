package config

import (
	"bytes"
	"errors"
	"fmt"
	"io"
	"reflect"
	"regexp"
	"sort"
	"strconv"
	"strings"
	"time"

	"go.yaml.in/yaml/v3"
)

// Error is one problem in a configuration. Key is the path of the key
// concerned, such as "hl7v2.forward" or "calibration[2].slope"; File and
// Line locate it when the configuration came from a file (Line 0: unknown).
type Error struct {
	File string
	Line int
	Key  string
	Msg  string
	Err  error // underlying cause, if any
}

// Error returns "file:line: key: msg", leaving out the parts that are unknown.
func (e *Error) Error() string {
	var b strings.Builder
	switch {
	case e.File != "" && e.Line > 0:
		fmt.Fprintf(&b, "%s:%d: ", e.File, e.Line)
	case e.File != "":
		b.WriteString(e.File + ": ")
	case e.Line > 0:
		fmt.Fprintf(&b, "line %d: ", e.Line)
	}
	if e.Key != "" {
		b.WriteString(e.Key + ": ")
	}
	b.WriteString(e.Msg)
	return b.String()
}

// Unwrap returns the underlying cause.
func (e *Error) Unwrap() error { return e.Err }

// problems collects errors; its methods never stop at the first.
type problems []*Error

func (ps *problems) add(key, format string, args ...any) {
	*ps = append(*ps, &Error{Key: key, Msg: fmt.Sprintf(format, args...)})
}

func (ps *problems) addErr(key, msg string, err error) {
	*ps = append(*ps, &Error{Key: key, Msg: msg + ": " + err.Error(), Err: err})
}

// join sorts the problems by line (unknown lines last, order otherwise
// kept) and joins them.
func (ps problems) join() error {
	sort.SliceStable(ps, func(i, j int) bool {
		li, lj := ps[i].Line, ps[j].Line
		if li == 0 || lj == 0 {
			return li != 0 && lj == 0
		}
		return li < lj
	})
	errs := make([]error, len(ps))
	for i, e := range ps {
		errs[i] = e
	}
	return errors.Join(errs...)
}

func (ps problems) hasPrefix(prefixes ...string) bool {
	for _, e := range ps {
		for _, p := range prefixes {
			if e.Key == p || strings.HasPrefix(e.Key, p+".") || strings.HasPrefix(e.Key, p+"[") {
				return true
			}
		}
	}
	return false
}

// decoder checks a YAML node tree against the configuration types before it
// is decoded. yaml.v3's Decoder.KnownFields does not reach into types with
// an UnmarshalYAML method (go-yaml issue #460), which every section has, so
// strictness is enforced here, with key paths and line numbers, and all
// problems are collected rather than the first.
type decoder struct {
	file     string
	lookup   func(string) (string, bool)
	errs     problems
	lines    map[string]int
	expanded map[*yaml.Node]bool
}

func newDecoder(file string, lookup func(string) (string, bool)) *decoder {
	return &decoder{file: file, lookup: lookup, lines: map[string]int{}, expanded: map[*yaml.Node]bool{}}
}

func (d *decoder) add(line int, key, format string, args ...any) {
	d.errs = append(d.errs, &Error{File: d.file, Line: line, Key: key, Msg: fmt.Sprintf(format, args...)})
}

// line returns the line of key, or of its nearest enclosing key present in
// the file.
func (d *decoder) line(key string) int {
	for key != "" {
		if l, ok := d.lines[key]; ok {
			return l
		}
		if strings.HasSuffix(key, "]") {
			key = key[:strings.LastIndexByte(key, '[')]
			continue
		}
		i := strings.LastIndexByte(key, '.')
		if i < 0 {
			return 0
		}
		key = key[:i]
	}
	return 0
}

var yamlLineRE = regexp.MustCompile(`^yaml: line (\d+): (.*)$`)

// parse reads exactly one YAML document. It returns nil for an empty
// document and an *Error for a syntax error.
func (d *decoder) parse(data []byte) (*yaml.Node, error) {
	dec := yaml.NewDecoder(bytes.NewReader(data))
	// KnownFields has no effect on decoding into a yaml.Node and does not
	// propagate through UnmarshalYAML; check enforces known keys instead. It
	// is set so that any direct decode through this decoder stays strict.
	dec.KnownFields(true)
	var doc yaml.Node
	if err := dec.Decode(&doc); err != nil {
		if errors.Is(err, io.EOF) {
			return nil, nil
		}
		return nil, d.syntaxError(err)
	}
	var extra yaml.Node
	switch err := dec.Decode(&extra); {
	case errors.Is(err, io.EOF):
	case err != nil:
		return nil, d.syntaxError(err)
	default:
		return nil, &Error{File: d.file, Line: extra.Line, Msg: "more than one YAML document; a configuration is one document"}
	}
	if doc.Kind != yaml.DocumentNode || len(doc.Content) == 0 {
		return nil, nil
	}
	root := doc.Content[0]
	if root.Kind == yaml.ScalarNode && root.ShortTag() == "!!null" {
		return nil, nil
	}
	if root.Kind != yaml.MappingNode {
		return nil, &Error{File: d.file, Line: root.Line, Msg: "the top level must be a mapping of keys (site, store, http, ...)"}
	}
	return root, nil
}

func (d *decoder) syntaxError(err error) error {
	msg := err.Error()
	if m := yamlLineRE.FindStringSubmatch(msg); m != nil {
		line, _ := strconv.Atoi(m[1])
		return &Error{File: d.file, Line: line, Msg: "invalid YAML: " + m[2], Err: err}
	}
	return &Error{File: d.file, Msg: "invalid YAML: " + strings.TrimPrefix(msg, "yaml: "), Err: err}
}

// yamlMessage strips yaml.v3's prefixes from a decoding error.
func yamlMessage(err error) string {
	var te *yaml.TypeError
	if errors.As(err, &te) && len(te.Errors) > 0 {
		msgs := make([]string, len(te.Errors))
		for i, m := range te.Errors {
			if j := strings.Index(m, ": "); strings.HasPrefix(m, "line ") && j > 0 {
				m = m[j+2:]
			}
			msgs[i] = m
		}
		return strings.Join(msgs, "; ")
	}
	return strings.TrimPrefix(err.Error(), "yaml: ")
}

var (
	configType   = reflect.TypeFor[Config]()
	durationType = reflect.TypeFor[time.Duration]()
	scalarType   = reflect.TypeFor[scalarValue]()
)

// scalarValue marks struct types written as a single YAML scalar.
type scalarValue interface{ scalarYAML() }

// check walks n against type t at key path key. It records line numbers,
// expands environment variables in string values, reports unknown keys,
// duplicate keys and values of the wrong type, and removes what it
// reports so that the tree then decodes cleanly.
func (d *decoder) check(n *yaml.Node, t reflect.Type, key string) {
	if n.Kind == yaml.AliasNode && n.Alias != nil {
		n = n.Alias
	}
	if n.Kind == yaml.ScalarNode && n.ShortTag() == "!!null" {
		return // keeps the default
	}
	for t.Kind() == reflect.Pointer {
		t = t.Elem()
	}
	switch {
	case t == durationType:
		d.checkDuration(n, key)
		return
	case reflect.PointerTo(t).Implements(scalarType):
		d.checkScalar(n, t, key)
		return
	}
	switch t.Kind() {
	case reflect.Struct:
		d.checkStruct(n, t, key)
	case reflect.Slice:
		if n.Kind != yaml.SequenceNode {
			d.wrongKind(n, key, "a list")
			return
		}
		for i, item := range n.Content {
			k := fmt.Sprintf("%s[%d]", key, i)
			d.lines[k] = item.Line
			d.check(item, t.Elem(), k)
		}
	case reflect.Map:
		if n.Kind != yaml.MappingNode {
			d.wrongKind(n, key, "a mapping")
			return
		}
		d.checkMapping(n, key, func(name string) (reflect.Type, bool) { return t.Elem(), true }, nil)
	default:
		d.checkScalar(n, t, key)
	}
}

func (d *decoder) checkStruct(n *yaml.Node, t reflect.Type, key string) {
	if n.Kind != yaml.MappingNode {
		d.wrongKind(n, key, "a mapping")
		return
	}
	fields := map[string]reflect.Type{}
	var names []string
	for i := range t.NumField() {
		f := t.Field(i)
		name, _, _ := strings.Cut(f.Tag.Get("yaml"), ",")
		if !f.IsExported() || name == "" || name == "-" {
			continue
		}
		fields[name] = f.Type
		names = append(names, name)
	}
	d.checkMapping(n, key, func(name string) (reflect.Type, bool) {
		ft, ok := fields[name]
		return ft, ok
	}, names)
}

// checkMapping checks the entries of a mapping node; field returns the type
// of a key's value, or false for an unknown key. known, when not nil, lists
// the valid keys for suggestions.
func (d *decoder) checkMapping(n *yaml.Node, key string, field func(string) (reflect.Type, bool), known []string) {
	seen := map[string]int{}
	kept := n.Content[:0:0]
	for i := 0; i+1 < len(n.Content); i += 2 {
		kn, vn := n.Content[i], n.Content[i+1]
		if kn.Kind == yaml.AliasNode && kn.Alias != nil {
			kn = kn.Alias
		}
		if kn.Kind != yaml.ScalarNode {
			d.add(kn.Line, key, "keys must be plain strings")
			continue
		}
		name := kn.Value
		k := join(key, name)
		if kn.Tag == "!!merge" || name == "<<" {
			d.add(kn.Line, key, "merge keys (<<) are not supported; repeat the keys or use an alias for the whole value")
			continue
		}
		if first, dup := seen[name]; dup {
			d.add(kn.Line, k, "duplicate key (first set on line %d)", first)
			continue
		}
		seen[name] = kn.Line
		ft, ok := field(name)
		if !ok {
			msg := "unknown key"
			if s := suggest(name, known); s != "" {
				msg += fmt.Sprintf(" (did you mean %q?)", s)
			}
			d.add(kn.Line, k, "%s", msg)
			continue
		}
		d.lines[k] = kn.Line
		d.check(vn, ft, k)
		kept = append(kept, kn, vn)
	}
	n.Content = kept
}

func join(key, name string) string {
	if key == "" {
		return name
	}
	return key + "." + name
}

func (d *decoder) wrongKind(n *yaml.Node, key, want string) {
	d.add(n.Line, key, "must be %s, not %s", want, kindName(n))
	setNull(n)
}

func kindName(n *yaml.Node) string {
	switch n.Kind {
	case yaml.MappingNode:
		return "a mapping"
	case yaml.SequenceNode:
		return "a list"
	default:
		return "a single value"
	}
}

// setNull turns a rejected value into null, which keeps the default.
func setNull(n *yaml.Node) {
	*n = yaml.Node{Kind: yaml.ScalarNode, Tag: "!!null", Line: n.Line, Column: n.Column}
}

func (d *decoder) checkDuration(n *yaml.Node, key string) {
	if n.Kind != yaml.ScalarNode {
		d.wrongKind(n, key, "a duration")
		return
	}
	if _, err := time.ParseDuration(n.Value); err != nil || n.ShortTag() != "!!str" {
		d.add(n.Line, key, "invalid duration %q (use a Go duration such as 30s, 5m or 1h30m)", n.Value)
		setNull(n)
	}
}

func (d *decoder) checkScalar(n *yaml.Node, t reflect.Type, key string) {
	if n.Kind != yaml.ScalarNode {
		d.wrongKind(n, key, "a single value")
		return
	}
	switch t.Kind() {
	case reflect.String:
		d.expand(n, key)
		return
	case reflect.Int, reflect.Int8, reflect.Int16, reflect.Int32, reflect.Int64:
		if n.ShortTag() != "!!int" {
			d.add(n.Line, key, "must be a whole number, not %q", n.Value)
			setNull(n)
			return
		}
	case reflect.Float32, reflect.Float64:
		if tag := n.ShortTag(); tag != "!!int" && tag != "!!float" {
			d.add(n.Line, key, "must be a number, not %q", n.Value)
			setNull(n)
			return
		}
	case reflect.Bool:
		if n.ShortTag() != "!!bool" {
			d.add(n.Line, key, "must be true or false, not %q", n.Value)
			setNull(n)
			return
		}
	}
	if err := n.Decode(reflect.New(t).Interface()); err != nil {
		d.add(n.Line, key, "%s", yamlMessage(err))
		setNull(n)
	}
}

// expand replaces ${NAME} in a string value, once per node.
func (d *decoder) expand(n *yaml.Node, key string) {
	if d.expanded[n] {
		return
	}
	d.expanded[n] = true
	if !strings.Contains(n.Value, "$") {
		return
	}
	v, err := expandEnv(n.Value, d.lookup)
	if err != nil {
		d.add(n.Line, key, "%v", err)
		setNull(n)
		return
	}
	n.Value, n.Tag, n.Style = v, "!!str", yaml.DoubleQuotedStyle
}

// expandEnv replaces ${NAME} with the value of environment variable NAME and
// "$$" with "$". Any other "$" is kept. A variable that is not set is an
// error; one set to the empty string expands to "".
func expandEnv(s string, lookup func(string) (string, bool)) (string, error) {
	var b strings.Builder
	for i := 0; i < len(s); i++ {
		c := s[i]
		if c != '$' || i+1 == len(s) {
			b.WriteByte(c)
			continue
		}
		switch s[i+1] {
		case '$':
			b.WriteByte('$')
			i++
		case '{':
			end := strings.IndexByte(s[i+2:], '}')
			if end < 0 {
				return "", fmt.Errorf("unterminated ${ (write $$ for a literal $)")
			}
			name := s[i+2 : i+2+end]
			if !validEnvName(name) {
				return "", fmt.Errorf("invalid environment variable name %q in ${...}", name)
			}
			v, ok := lookup(name)
			if !ok {
				return "", fmt.Errorf("environment variable %s is not set", name)
			}
			b.WriteString(v)
			i += 2 + end
		default:
			b.WriteByte(c)
		}
	}
	return b.String(), nil
}

func validEnvName(s string) bool {
	if s == "" {
		return false
	}
	for i, r := range s {
		switch {
		case r == '_', r >= 'A' && r <= 'Z', r >= 'a' && r <= 'z':
		case r >= '0' && r <= '9' && i > 0:
		default:
			return false
		}
	}
	return true
}

// suggest returns the known key closest to name when it is a likely typo.
func suggest(name string, known []string) string {
	best, bestD := "", 3
	for _, k := range known {
		if dd := editDistance(name, k); dd < bestD {
			best, bestD = k, dd
		}
	}
	return best
}

func editDistance(a, b string) int {
	prev := make([]int, len(b)+1)
	cur := make([]int, len(b)+1)
	for j := range prev {
		prev[j] = j
	}
	for i := 1; i <= len(a); i++ {
		cur[0] = i
		for j := 1; j <= len(b); j++ {
			cost := 1
			if a[i-1] == b[j-1] {
				cost = 0
			}
			cur[j] = min(prev[j]+1, cur[j-1]+1, prev[j-1]+cost)
		}
		prev, cur = cur, prev
	}
	return prev[len(b)]
}
