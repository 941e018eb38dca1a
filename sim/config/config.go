// Package config reads scenario YAML files strictly and reports problems as
// "FILE:LINE: FIELD: message", so a user can find the bad line at once.
package config

import (
	"bytes"
	"errors"
	"fmt"
	"os"
	"reflect"
	"regexp"
	"strconv"
	"strings"

	"go.yaml.in/yaml/v3"
)

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
	data, err := os.ReadFile(path)
	if err != nil {
		return nil, fmt.Errorf("scenario file: %w", err)
	}
	return Parse(path, data, dst)
}

var (
	lineRe    = regexp.MustCompile(`^(?:yaml: )?line (\d+): (.*)$`)
	unknownRe = regexp.MustCompile(`^field (\S+) not found in type \S+$`)
)

// Parse is ReadFile on bytes already read; name is used in messages.
func Parse(name string, data []byte, dst any) (*Doc, error) {
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

// wrapYAML turns the yaml library's messages into our FILE:LINE form.
func (d *Doc) wrapYAML(err error) error {
	var te *yaml.TypeError
	msgs := []string{err.Error()}
	if errors.As(err, &te) {
		msgs = te.Errors
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
