// Package config reads scenario YAML files strictly and reports problems as
// "FILE:LINE: FIELD: message", so a user can find the bad line at once.
//
// # Limits
//
// A scenario file holds at most MaxFileBytes: ReadFile and ReadBytes check
// the size before reading, Parse before parsing. Parsing n bytes allocates
// at most AllocPerByte*n + AllocFixed bytes (FuzzParse holds Parse to it).
// The YAML library's own safeguards are not enough for that, so Parse
// refuses, before decoding:
//
//   - aliases (*name) and merge keys (<<): a few lines of aliases expand to
//     hundreds of thousands of values, and Has and Line see the document
//     as written, so a field set through an alias would be misreported;
//   - a key given twice in one mapping: the library compares every pair of
//     keys and reports every repeated pair, gigabytes of messages for a
//     few kB of one repeated key;
//   - a key the destination struct does not have (the library would report
//     it too, but only after that every-pair comparison, which takes tens
//     of seconds on a 1 MB mapping).
//
// Only the first few problems the library reports are kept.
package config

import (
	"bytes"
	"errors"
	"fmt"
	"io"
	"os"
	"reflect"
	"regexp"
	"strconv"
	"strings"

	"go.yaml.in/yaml/v3"
)

// MaxFileBytes is the largest scenario file accepted. The demo solar park
// is 4 kB; upkeep's Format writes a park at its 1000-site limit, with
// levels at their limit and a chain per site, in about 0.5 MB.
const MaxFileBytes = 1 << 20

// The documented allocation bound of one Parse: AllocPerByte times the
// input size plus AllocFixed. The YAML library builds a node tree twice
// (once for Line and Has, once to decode strictly) at a few hundred bytes
// a node, and a node can be two bytes of input ("1,"); nesting costs it
// about 2 kB a level, and a level can be two bytes too ("- - - 1"), which
// is the worst case seen, at about 1000 bytes per input byte.
const (
	AllocPerByte = 1536
	AllocFixed   = 1 << 20
)

// maxReported is how many of the YAML library's messages an error keeps:
// one bad list can produce a message per element.
const maxReported = 10

// Doc is a parsed YAML document that remembers where each field stood.
type Doc struct {
	File string
	root *yaml.Node
}

// Error is a problem with one field of a scenario file.
type Error struct {
	File  string
	Line  int
	Field string
	Msg   string
}

func (e *Error) Error() string {
	switch {
	case e.Line > 0 && e.Field != "":
		return fmt.Sprintf("%s:%d: %s: %s", e.File, e.Line, e.Field, e.Msg)
	case e.Line > 0:
		return fmt.Sprintf("%s:%d: %s", e.File, e.Line, e.Msg)
	case e.Field != "":
		return fmt.Sprintf("%s: %s: %s", e.File, e.Field, e.Msg)
	}
	return fmt.Sprintf("%s: %s", e.File, e.Msg)
}

// ReadFile loads path into dst (a pointer to a struct with yaml tags).
// Unknown keys, wrong types and syntax errors are errors naming the line.
func ReadFile(path string, dst any) (*Doc, error) {
	data, err := ReadBytes(path)
	if err != nil {
		return nil, err
	}
	return Parse(path, data, dst)
}

// ReadBytes reads a scenario file whole, refusing one over MaxFileBytes
// before reading it.
func ReadBytes(path string) ([]byte, error) {
	f, err := os.Open(path)
	if err != nil {
		return nil, fmt.Errorf("scenario file: %w", err)
	}
	defer f.Close()
	if fi, err := f.Stat(); err == nil && fi.Mode().IsRegular() && fi.Size() > MaxFileBytes {
		return nil, tooBig(path, fi.Size())
	}
	// A pipe has no size, and a file can grow after Stat: read one byte
	// past the limit to tell.
	data, err := io.ReadAll(io.LimitReader(f, MaxFileBytes+1))
	if err != nil {
		return nil, fmt.Errorf("scenario file: %w", err)
	}
	if len(data) > MaxFileBytes {
		return nil, tooBig(path, -1)
	}
	return data, nil
}

// tooBig refuses a file of size bytes (-1: unknown, but over the limit).
func tooBig(name string, size int64) error {
	if size < 0 {
		return &Error{File: name, Msg: fmt.Sprintf("more than the %d-byte limit for scenario files (config.MaxFileBytes)", MaxFileBytes)}
	}
	return &Error{File: name, Msg: fmt.Sprintf("%d bytes, more than the %d-byte limit for scenario files (config.MaxFileBytes)", size, MaxFileBytes)}
}

var (
	lineRe    = regexp.MustCompile(`^(?:yaml: )?line (\d+): (.*)$`)
	unknownRe = regexp.MustCompile(`^field (\S+) not found in type \S+$`)
)

// Parse is ReadFile on bytes already read; name is used in messages.
func Parse(name string, data []byte, dst any) (*Doc, error) {
	if len(data) > MaxFileBytes {
		return nil, tooBig(name, int64(len(data)))
	}
	d := &Doc{File: name}
	var root yaml.Node
	if err := yaml.Unmarshal(data, &root); err != nil {
		return nil, d.wrapYAML(err)
	}
	if len(root.Content) == 0 {
		return nil, &Error{File: name, Msg: "file is empty"}
	}
	d.root = root.Content[0]
	if d.root.Kind != yaml.MappingNode {
		return nil, &Error{File: name, Line: d.root.Line, Msg: "top level must be a mapping of field: value"}
	}
	if err := d.plain(d.root, reflect.TypeOf(dst)); err != nil {
		return nil, err
	}
	dec := yaml.NewDecoder(bytes.NewReader(data))
	dec.KnownFields(true)
	if err := dec.Decode(dst); err != nil {
		return nil, d.wrapYAML(err)
	}
	// The YAML library truncates 2.9 into an int field without a word;
	// a harbor 2.9 cells wide is a typo, not a 2.
	if err := d.wholeNumbers(d.root, reflect.ValueOf(dst), ""); err != nil {
		return nil, err
	}
	return d, nil
}

// wholeNumbers walks the document beside the Go value it was decoded into
// and refuses fractional numbers where the field is an integer.
func (d *Doc) wholeNumbers(n *yaml.Node, v reflect.Value, path string) error {
	for v.Kind() == reflect.Pointer || v.Kind() == reflect.Interface {
		if v.IsNil() {
			return nil
		}
		v = v.Elem()
	}
	switch n.Kind {
	case yaml.ScalarNode:
		switch v.Kind() {
		case reflect.Int, reflect.Int8, reflect.Int16, reflect.Int32, reflect.Int64,
			reflect.Uint, reflect.Uint8, reflect.Uint16, reflect.Uint32, reflect.Uint64:
			if n.Tag == "!!float" {
				return &Error{File: d.File, Line: n.Line, Field: path, Msg: fmt.Sprintf("want a whole number, got %s", n.Value)}
			}
		}
	case yaml.SequenceNode:
		if v.Kind() != reflect.Slice && v.Kind() != reflect.Array {
			return nil
		}
		for i, c := range n.Content {
			if i < v.Len() {
				if err := d.wholeNumbers(c, v.Index(i), fmt.Sprintf("%s[%d]", path, i)); err != nil {
					return err
				}
			}
		}
	case yaml.MappingNode:
		if v.Kind() != reflect.Struct {
			return nil
		}
		t := v.Type()
		for i := 0; i+1 < len(n.Content); i += 2 {
			key := n.Content[i].Value
			for f := 0; f < t.NumField(); f++ {
				tag, _, _ := strings.Cut(t.Field(f).Tag.Get("yaml"), ",")
				if tag == key && t.Field(f).IsExported() {
					p := key
					if path != "" {
						p = path + "." + key
					}
					if err := d.wholeNumbers(n.Content[i+1], v.Field(f), p); err != nil {
						return err
					}
				}
			}
		}
	}
	return nil
}

// plain refuses, before the YAML library decodes the document, what the
// library would spend more than linear time or memory on: see the package
// doc. It walks the node tree beside the Go type it will be decoded into.
func (d *Doc) plain(root *yaml.Node, t reflect.Type) error {
	w := walker{d: d, fields: map[reflect.Type]map[string]reflect.Type{}}
	return w.walk(root, t)
}

type walker struct {
	d *Doc
	// path is the way down to the current node, a key or an index a step;
	// it is spelt out only for an error, since spelling it per node would
	// cost depth squared on deeply nested input.
	path   []step
	fields map[reflect.Type]map[string]reflect.Type // by struct, nil: not checked
}

type step struct {
	key string
	idx int // -1 for a mapping key
}

var (
	nodeType        = reflect.TypeFor[yaml.Node]()
	unmarshalerType = reflect.TypeFor[yaml.Unmarshaler]()
)

// walk checks n, to be decoded into t; t is nil where the decoder will not
// look into n as a struct, so only the structural checks apply.
func (w *walker) walk(n *yaml.Node, t reflect.Type) error {
	for t != nil && t.Kind() == reflect.Pointer {
		t = t.Elem()
	}
	if t != nil && (t == nodeType || reflect.PointerTo(t).Implements(unmarshalerType)) {
		t = nil
	}
	switch n.Kind {
	case yaml.AliasNode:
		return w.errorf(n.Line, "aliases (*%s) are not supported in scenario files: write the value out", n.Value)
	case yaml.SequenceNode:
		var et reflect.Type
		if t != nil && (t.Kind() == reflect.Slice || t.Kind() == reflect.Array) {
			et = t.Elem()
		}
		for i, c := range n.Content {
			w.path = append(w.path, step{idx: i})
			if err := w.walk(c, et); err != nil {
				return err
			}
			w.path = w.path[:len(w.path)-1]
		}
	case yaml.MappingNode:
		if err := w.uniqueKeys(n); err != nil {
			return err
		}
		var fields map[string]reflect.Type
		var elem reflect.Type
		switch {
		case t == nil:
		case t.Kind() == reflect.Struct:
			fields = w.structFields(t)
		case t.Kind() == reflect.Map:
			elem = t.Elem()
		}
		for i := 0; i+1 < len(n.Content); i += 2 {
			k, v := n.Content[i], n.Content[i+1]
			if k.Kind == yaml.ScalarNode && k.Value == "<<" && (k.Tag == "" || k.Tag == "!" || k.ShortTag() == "!!merge") {
				return w.errorf(k.Line, "merge keys (<<) are not supported in scenario files: write the fields out")
			}
			// Keys are decoded too (into maps), so they get the same checks.
			if err := w.walk(k, nil); err != nil {
				return err
			}
			vt := elem
			if fields != nil {
				if k.Kind != yaml.ScalarNode {
					return w.errorf(k.Line, "a field name must be plain text")
				}
				ft, ok := fields[k.Value]
				if !ok {
					return &Error{File: w.d.File, Line: k.Line, Msg: fmt.Sprintf("unknown field %q (misspelt, or a file for another scenario?)", k.Value)}
				}
				vt = ft
			}
			w.path = append(w.path, step{key: k.Value, idx: -1})
			if err := w.walk(v, vt); err != nil {
				return err
			}
			w.path = w.path[:len(w.path)-1]
		}
	}
	return nil
}

// uniqueKeys refuses a key given twice, by the library's rule (same kind,
// same text), in time linear in the keys.
func (w *walker) uniqueKeys(n *yaml.Node) error {
	type key struct {
		kind  yaml.Kind
		value string
	}
	dup := func(i, j int) error {
		a, b := n.Content[i], n.Content[j]
		if b.Kind != yaml.ScalarNode || b.Value == "" {
			return w.errorf(b.Line, "a key given twice (first on line %d)", a.Line)
		}
		w.path = append(w.path, step{key: b.Value, idx: -1})
		return w.errorf(b.Line, "given twice (first on line %d)", a.Line)
	}
	if len(n.Content) <= 32 {
		for j := 2; j < len(n.Content); j += 2 {
			for i := 0; i < j; i += 2 {
				if n.Content[i].Kind == n.Content[j].Kind && n.Content[i].Value == n.Content[j].Value {
					return dup(i, j)
				}
			}
		}
		return nil
	}
	seen := make(map[key]int, len(n.Content)/2)
	for j := 0; j < len(n.Content); j += 2 {
		k := key{n.Content[j].Kind, n.Content[j].Value}
		if i, ok := seen[k]; ok {
			return dup(i, j)
		}
		seen[k] = j
	}
	return nil
}

// structFields maps the keys the library decodes into t to the field
// types, or is nil for a struct this check leaves to the library (inline
// fields, or a tag it would refuse).
func (w *walker) structFields(t reflect.Type) map[string]reflect.Type {
	if f, ok := w.fields[t]; ok {
		return f
	}
	// The library's rules: exported fields, the yaml tag's name or else
	// the whole tag when it has no colon, else the lowercased field name.
	f := map[string]reflect.Type{}
	for i := range t.NumField() {
		sf := t.Field(i)
		if !sf.IsExported() && !sf.Anonymous {
			continue
		}
		tag := sf.Tag.Get("yaml")
		if tag == "" && !strings.Contains(string(sf.Tag), ":") {
			tag = string(sf.Tag)
		}
		if tag == "-" {
			continue
		}
		name, opts, _ := strings.Cut(tag, ",")
		if strings.Contains(opts, "inline") {
			f = nil
			break
		}
		if name == "" {
			name = strings.ToLower(sf.Name)
		}
		f[name] = sf.Type
	}
	w.fields[t] = f
	return f
}

// errorf makes an Error for the current path.
func (w *walker) errorf(line int, format string, args ...any) error {
	var b strings.Builder
	for _, s := range w.path {
		switch {
		case s.idx >= 0:
			fmt.Fprintf(&b, "[%d]", s.idx)
		case b.Len() > 0:
			b.WriteString("." + s.key)
		default:
			b.WriteString(s.key)
		}
	}
	return &Error{File: w.d.File, Line: line, Field: b.String(), Msg: fmt.Sprintf(format, args...)}
}

// wrapYAML turns the yaml library's messages into our FILE:LINE form.
func (d *Doc) wrapYAML(err error) error {
	var te *yaml.TypeError
	msgs := []string{err.Error()}
	if errors.As(err, &te) {
		msgs = te.Errors
	}
	more := 0
	if len(msgs) > maxReported {
		msgs, more = msgs[:maxReported], len(msgs)-maxReported
	}
	var out []string
	for _, m := range msgs {
		m = strings.TrimPrefix(m, "yaml: ")
		if g := lineRe.FindStringSubmatch(m); g != nil {
			msg := g[2]
			if f := unknownRe.FindStringSubmatch(msg); f != nil {
				msg = fmt.Sprintf("unknown field %q (misspelt, or a file for another scenario?)", f[1])
			}
			msg = strings.Replace(msg, "cannot unmarshal !!str", "cannot read the text", 1)
			msg = strings.Replace(msg, "cannot unmarshal !!float", "cannot read the number", 1)
			out = append(out, fmt.Sprintf("%s:%s: %s", d.File, g[1], msg))
			continue
		}
		out = append(out, fmt.Sprintf("%s: %s", d.File, m))
	}
	if more > 0 {
		out = append(out, fmt.Sprintf("%s: and %d more problems", d.File, more))
	}
	return errors.New(strings.Join(out, "\n"))
}

// Line returns the line of the field at path ("grid.width", "slicks[2].x",
// "sites[0]"), or of the closest enclosing field that exists, or 0.
func (d *Doc) Line(path string) int {
	if d == nil || d.root == nil {
		return 0
	}
	n := d.root
	line := n.Line
	for _, part := range splitPath(path) {
		next, l := child(n, part)
		if next == nil {
			return line
		}
		n, line = next, l
	}
	return line
}

// Has reports whether the file sets the field at path.
func (d *Doc) Has(path string) bool {
	if d == nil || d.root == nil {
		return false
	}
	n := d.root
	for _, part := range splitPath(path) {
		next, _ := child(n, part)
		if next == nil {
			return false
		}
		n = next
	}
	return true
}

// Errorf makes an Error for the field at path.
func (d *Doc) Errorf(path, format string, args ...any) error {
	file := "<defaults>"
	if d != nil {
		file = d.File
	}
	return &Error{File: file, Line: d.Line(path), Field: path, Msg: fmt.Sprintf(format, args...)}
}

func splitPath(path string) []string {
	var parts []string
	for _, p := range strings.Split(path, ".") {
		for p != "" {
			i := strings.IndexByte(p, '[')
			if i < 0 {
				parts = append(parts, p)
				break
			}
			if i > 0 {
				parts = append(parts, p[:i])
			}
			j := strings.IndexByte(p, ']')
			if j < i {
				parts = append(parts, p)
				break
			}
			parts = append(parts, p[i:j+1])
			p = p[j+1:]
		}
	}
	return parts
}

// child finds a mapping key or sequence index below n; the line returned is
// the key's line for mappings and the element's line for sequences.
func child(n *yaml.Node, part string) (*yaml.Node, int) {
	if strings.HasPrefix(part, "[") {
		idx, err := strconv.Atoi(strings.Trim(part, "[]"))
		if err != nil || n.Kind != yaml.SequenceNode || idx < 0 || idx >= len(n.Content) {
			return nil, 0
		}
		c := n.Content[idx]
		return c, c.Line
	}
	if n.Kind != yaml.MappingNode {
		return nil, 0
	}
	for i := 0; i+1 < len(n.Content); i += 2 {
		if n.Content[i].Value == part {
			return n.Content[i+1], n.Content[i].Line
		}
	}
	return nil, 0
}
