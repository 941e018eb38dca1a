package result

import (
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"math"
	"reflect"
	"strconv"
	"sync"
)

// MaxJSONBytes bounds what ReadJSON accepts: a report is figures, not
// raw logs, so anything near this size is a mistake or not a report.
const MaxJSONBytes = 64 << 20

// WriteJSON writes the report as indented JSON.
func (r *Report) WriteJSON(w io.Writer) error {
	enc := json.NewEncoder(w)
	enc.SetIndent("", "  ")
	// Names and fault lines are ours; keep "<" and "&" readable.
	enc.SetEscapeHTML(false)
	if err := enc.Encode(r); err != nil {
		return fmt.Errorf("result: writing report: %w", err)
	}
	return nil
}

// ReadJSON reads one report written by WriteJSON. It refuses input over
// MaxJSONBytes, anything that is not a single JSON object, and reports
// whose histograms do not fit together (see Validate).
func ReadJSON(rd io.Reader) (*Report, error) {
	b, err := io.ReadAll(io.LimitReader(rd, MaxJSONBytes+1))
	if err != nil {
		return nil, fmt.Errorf("result: reading report: %w", err)
	}
	if len(b) > MaxJSONBytes {
		return nil, fmt.Errorf("result: report input exceeds %d MiB; refusing to read it", MaxJSONBytes>>20)
	}
	body := bytes.TrimSpace(b)
	if len(body) == 0 {
		return nil, errors.New("result: report input is empty")
	}
	if body[0] != '{' {
		return nil, fmt.Errorf("result: not a drill report: expected a JSON object, input starts with %q", prefix(body, 16))
	}
	dec := json.NewDecoder(bytes.NewReader(body))
	var r Report
	if err := dec.Decode(&r); err != nil {
		var syn *json.SyntaxError
		if errors.As(err, &syn) {
			return nil, fmt.Errorf("result: report is not valid JSON at byte %d: %w", syn.Offset, err)
		}
		return nil, fmt.Errorf("result: decoding report: %w", err)
	}
	if dec.More() {
		return nil, fmt.Errorf("result: unexpected data after the report at byte %d", dec.InputOffset())
	}
	if err := r.Validate(); err != nil {
		return nil, err
	}
	return &r, nil
}

func prefix(b []byte, n int) string {
	if len(b) > n {
		b = b[:n]
	}
	return string(b)
}

// Validate checks what the renderers rely on: non-negative sizes and
// latency histograms whose edges rise and bracket their counts.
func (r *Report) Validate() error {
	if r.Robots < 0 || r.Rounds < 0 || r.Episodes < 0 {
		return fmt.Errorf("result: negative size (robots %d, rounds %d, episodes %d)", r.Robots, r.Rounds, r.Episodes)
	}
	for i, c := range r.Configs {
		if err := c.Latency.validate(); err != nil {
			return fmt.Errorf("result: config %d (%q): latency histogram: %w", i, c.Name, err)
		}
	}
	return nil
}

func (h Histogram) validate() error {
	if len(h.EdgesMs) == 0 && len(h.Counts) == 0 {
		return nil
	}
	if len(h.EdgesMs) != len(h.Counts)+1 {
		return fmt.Errorf("%d edges for %d counts (want counts+1)", len(h.EdgesMs), len(h.Counts))
	}
	for i, e := range h.EdgesMs {
		// Only the last edge may be open (+Inf): an overflow bin.
		if math.IsNaN(e) || math.IsInf(e, -1) || (math.IsInf(e, 1) && i != len(h.EdgesMs)-1) {
			return fmt.Errorf("edge %d is %v", i, e)
		}
		if i > 0 && e <= h.EdgesMs[i-1] {
			return fmt.Errorf("edges not increasing at %d (%v after %v)", i, e, h.EdgesMs[i-1])
		}
	}
	for i, n := range h.Counts {
		if n < 0 {
			return fmt.Errorf("count %d is negative (%d)", i, n)
		}
	}
	return nil
}

// JSON has no NaN or infinities, yet a drill produces them: Retained is
// 0/0 when the base and sequential costs tie, and a histogram's last edge
// may be +Inf. encoding/json refuses such values, so Report, Config and
// Histogram encode through a mirror of themselves whose float64 fields
// write NaN as null and ±Inf as "+Inf"/"-Inf" (and read them back). The
// mirror is built by reflection so that fields added later are covered
// and keep their order and tags.

// MarshalJSON implements json.Marshaler (see the note on jsonFloat).
func (r Report) MarshalJSON() ([]byte, error) { return marshalMirror(reflect.ValueOf(r)) }

// UnmarshalJSON implements json.Unmarshaler.
func (r *Report) UnmarshalJSON(b []byte) error { return unmarshalMirror(b, reflect.ValueOf(r)) }

// MarshalJSON implements json.Marshaler.
func (c Config) MarshalJSON() ([]byte, error) { return marshalMirror(reflect.ValueOf(c)) }

// UnmarshalJSON implements json.Unmarshaler.
func (c *Config) UnmarshalJSON(b []byte) error { return unmarshalMirror(b, reflect.ValueOf(c)) }

// MarshalJSON implements json.Marshaler.
func (h Histogram) MarshalJSON() ([]byte, error) { return marshalMirror(reflect.ValueOf(h)) }

// UnmarshalJSON implements json.Unmarshaler.
func (h *Histogram) UnmarshalJSON(b []byte) error { return unmarshalMirror(b, reflect.ValueOf(h)) }

// jsonFloat is a float64 that encodes NaN as null and ±Inf as strings.
type jsonFloat float64

func (f jsonFloat) MarshalJSON() ([]byte, error) {
	v := float64(f)
	switch {
	case math.IsNaN(v):
		return []byte("null"), nil
	case math.IsInf(v, 1):
		return []byte(`"+Inf"`), nil
	case math.IsInf(v, -1):
		return []byte(`"-Inf"`), nil
	}
	return strconv.AppendFloat(nil, v, 'g', -1, 64), nil
}

func (f *jsonFloat) UnmarshalJSON(b []byte) error {
	switch string(b) {
	case "null", `"NaN"`:
		*f = jsonFloat(math.NaN())
		return nil
	case `"+Inf"`, `"Inf"`:
		*f = jsonFloat(math.Inf(1))
		return nil
	case `"-Inf"`:
		*f = jsonFloat(math.Inf(-1))
		return nil
	}
	var v float64
	if err := json.Unmarshal(b, &v); err != nil {
		return err
	}
	*f = jsonFloat(v)
	return nil
}

// jsonFloats is a []float64 whose elements encode as jsonFloat. (A
// []jsonFloat would not convert to and from []float64.)
type jsonFloats []float64

func (s jsonFloats) MarshalJSON() ([]byte, error) {
	if s == nil {
		return []byte("null"), nil
	}
	b := []byte{'['}
	for i, v := range s {
		if i > 0 {
			b = append(b, ',')
		}
		e, _ := jsonFloat(v).MarshalJSON()
		b = append(b, e...)
	}
	return append(b, ']'), nil
}

func (s *jsonFloats) UnmarshalJSON(b []byte) error {
	if string(b) == "null" {
		*s = nil
		return nil
	}
	var fs []jsonFloat
	if err := json.Unmarshal(b, &fs); err != nil {
		return err
	}
	*s = make(jsonFloats, len(fs))
	for i, f := range fs {
		(*s)[i] = float64(f)
	}
	return nil
}

var (
	float64Type    = reflect.TypeFor[float64]()
	float64sType   = reflect.TypeFor[[]float64]()
	jsonFloatType  = reflect.TypeFor[jsonFloat]()
	jsonFloatsType = reflect.TypeFor[jsonFloats]()
	mirrors        sync.Map // reflect.Type -> mirror reflect.Type
)

// mirror returns a struct type like t whose float64 and []float64 fields
// are jsonFloat and []jsonFloat.
func mirror(t reflect.Type) reflect.Type {
	if m, ok := mirrors.Load(t); ok {
		return m.(reflect.Type)
	}
	fields := make([]reflect.StructField, t.NumField())
	for i := range fields {
		f := t.Field(i)
		switch f.Type {
		case float64Type:
			f.Type = jsonFloatType
		case float64sType:
			f.Type = jsonFloatsType
		}
		fields[i] = reflect.StructField{Name: f.Name, Type: f.Type, Tag: f.Tag}
	}
	m := reflect.StructOf(fields)
	mirrors.Store(t, m)
	return m
}

func marshalMirror(v reflect.Value) ([]byte, error) {
	m := reflect.New(mirror(v.Type())).Elem()
	for i := range v.NumField() {
		m.Field(i).Set(v.Field(i).Convert(m.Field(i).Type()))
	}
	return json.Marshal(m.Interface())
}

func unmarshalMirror(b []byte, p reflect.Value) error {
	v := p.Elem()
	m := reflect.New(mirror(v.Type()))
	// Start from the current values, as json.Unmarshal does for fields
	// absent from the input.
	for i := range v.NumField() {
		m.Elem().Field(i).Set(v.Field(i).Convert(m.Elem().Field(i).Type()))
	}
	if err := json.Unmarshal(b, m.Interface()); err != nil {
		return err
	}
	for i := range v.NumField() {
		v.Field(i).Set(m.Elem().Field(i).Convert(v.Field(i).Type()))
	}
	return nil
}
