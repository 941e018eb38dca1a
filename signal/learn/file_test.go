package learn

import (
	"baton/sim/fuzzcheck"
	"bytes"
	"crypto/sha256"
	"encoding/binary"
	"errors"
	"io/fs"
	"os"
	"path/filepath"
	"strings"
	"testing"
)

func TestModelFileRoundTrip(t *testing.T) {
	for _, name := range []string{"harbor", "upkeep"} {
		t.Run(name, func(t *testing.T) {
			fx := getFixture(t, name)
			data, err := fx.net.Marshal(7)
			if err != nil {
				t.Fatal(err)
			}
			t.Logf("%s model file: %d bytes", name, len(data))
			n, meta, err := Check(data, fx.m)
			if err != nil {
				t.Fatal(err)
			}
			want := fx.net.Meta()
			if meta.Version != 7 || meta.Scenario != name || meta.FeatureVersion != fx.f.Version() ||
				meta.Inputs != fx.f.Size() || meta.Outputs != fx.m.MaxControls() || meta.RobotsTrained != fx.m.Robots() ||
				meta.Seed != want.Seed || meta.Samples != want.Samples || meta.TrainAccuracy != want.TrainAccuracy ||
				meta.TestAccuracy != want.TestAccuracy || meta.CreatedBy != want.CreatedBy || len(meta.Hidden) != 1 {
				t.Errorf("meta after round trip: %+v\nbefore: %+v", meta, want)
			}
			for _, x := range fx.states {
				for r := range fx.m.Robots() {
					for k := range fx.m.Robots() {
						if a, b := fx.net.Predict(x, r, k), n.Predict(x, r, k); a != b {
							t.Fatalf("Predict(x, %d, %d): %d before, %d after the round trip", r, k, a, b)
						}
					}
				}
			}
			again, _ := n.Marshal(7)
			if !bytes.Equal(again, data) {
				t.Error("re-encoding a decoded model changed its bytes")
			}

			// Unmarshal alone: measurable, not yet able to Predict.
			u, _, err := Unmarshal(data)
			if err != nil {
				t.Fatal(err)
			}
			if u.Accuracy(fx.test) != fx.net.Accuracy(fx.test) {
				t.Error("accuracy changed across Unmarshal")
			}
			func() {
				defer func() {
					if recover() == nil {
						t.Error("Predict on an unbound net did not panic")
					}
				}()
				u.Predict(fx.states[0], 0, 0)
			}()
			if lb := AsBase(fx.m, u); lb.Base(fx.states[0], 1) != fx.net.Predict(fx.states[0], 1, 1) {
				t.Error("AsBase did not bind an unmarshalled net")
			}

			dir := t.TempDir()
			path := filepath.Join(dir, "guess.bgm")
			if err := fx.net.Save(path, 9); err != nil {
				t.Fatal(err)
			}
			if err := fx.net.Save(path, 10); err != nil { // over an existing file
				t.Fatal(err)
			}
			entries, _ := os.ReadDir(dir)
			if len(entries) != 1 {
				t.Errorf("Save left %d entries behind", len(entries))
			}
			_, meta, err = Load(path, fx.m)
			if err != nil || meta.Version != 10 {
				t.Fatalf("Load: %+v, %v", meta, err)
			}
			if _, _, err := Load(filepath.Join(dir, "missing"), fx.m); !errors.Is(err, fs.ErrNotExist) {
				t.Errorf("missing file: %v", err)
			}
		})
	}
}

// frame builds a model file around arbitrary contents, with a valid checksum.
func frame(body []byte) []byte {
	out := append([]byte(Magic), binary.BigEndian.AppendUint32(nil, uint32(len(body)))...)
	out = append(out, body...)
	sum := sha256.Sum256(body)
	return append(out, sum[:]...)
}

func TestModelFileRefusals(t *testing.T) {
	h, u := getFixture(t, "harbor"), getFixture(t, "upkeep")
	good, err := h.net.Marshal(3)
	if err != nil {
		t.Fatal(err)
	}
	flip := func(i int) []byte {
		b := bytes.Clone(good)
		b[i] ^= 0x40
		return b
	}
	otherVersion := func() []byte {
		n, _, _ := Unmarshal(good)
		n.meta.FeatureVersion = "harbor.0"
		b, _ := n.Marshal(3)
		return b
	}
	wrongInputs := func() []byte {
		n := newNet(10, []int{3}, 5, Tanh)
		n.meta.Scenario, n.meta.FeatureVersion = "harbor", "harbor.2"
		b, _ := n.Marshal(1)
		return b
	}
	wrongOutputs := func() []byte {
		n := newNet(h.f.Size(), []int{3}, 4, Tanh)
		n.meta.Scenario, n.meta.FeatureVersion = "harbor", "harbor.2"
		b, _ := n.Marshal(1)
		return b
	}
	cases := []struct {
		name   string
		data   []byte
		kind   error
		prefix string
	}{
		{"empty", nil, ErrTruncated, "truncated: "},
		{"part of the magic", good[:5], ErrTruncated, "truncated: "},
		{"magic only", good[:len(Magic)], ErrTruncated, "truncated: "},
		{"header only", good[:headerLen], ErrTruncated, "truncated: "},
		{"half", good[:len(good)/2], ErrTruncated, "truncated: "},
		{"last byte missing", good[:len(good)-1], ErrTruncated, "truncated: "},
		{"bad magic", flip(0), ErrMagic, "bad magic: "},
		{"not a model", []byte("levels: 3\nlevel_cost: [0, 1, 4, 12]\n"), ErrMagic, "bad magic: "},
		{"flipped body byte", flip(headerLen + 20), ErrChecksum, "checksum mismatch: "},
		{"flipped checksum byte", flip(len(good) - 1), ErrChecksum, "checksum mismatch: "},
		{"trailing bytes", append(bytes.Clone(good), 0), ErrFormat, ""},
		{"garbage contents", frame(bytes.Repeat([]byte{0xff}, 40)), ErrFormat, ""},
		{"other feature version", otherVersion(), ErrFeatureVersion, ""},
		{"wrong input count", wrongInputs(), ErrShape, "shape mismatch: "},
		{"wrong output count", wrongOutputs(), ErrShape, "shape mismatch: "},
		// Counted before decoding: two bytes each, a hundred decoded.
		{"a thousand empty layers", frame(bytes.Repeat([]byte{9<<3 | 2, 0}, 1000)), ErrShape, "shape mismatch: "},
	}
	kinds := []error{ErrTruncated, ErrMagic, ErrChecksum, ErrFormat, ErrScenario, ErrFeatureVersion, ErrShape}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			_, _, err := Check(c.data, h.m)
			if !errors.Is(err, c.kind) {
				t.Fatalf("got %v, want %v", err, c.kind)
			}
			for _, k := range kinds {
				if k != c.kind && errors.Is(err, k) {
					t.Errorf("%v also matches %v", err, k)
				}
			}
			if !strings.HasPrefix(err.Error(), c.prefix) {
				t.Errorf("message %q does not start with %q", err, c.prefix)
			}
			t.Log(err)
		})
	}

	_, _, err = Check(good, u.m)
	if !errors.Is(err, ErrScenario) || err.Error() != "model is for scenario harbor, this fleet runs upkeep" {
		t.Errorf("wrong scenario: %v", err)
	}

	// Load reports the same refusals, naming the file.
	path := filepath.Join(t.TempDir(), "guess.bgm")
	if err := os.WriteFile(path, good[:len(good)-10], 0o644); err != nil {
		t.Fatal(err)
	}
	if _, _, err := Load(path, h.m); !errors.Is(err, ErrTruncated) || !strings.Contains(err.Error(), path+": truncated: ") {
		t.Errorf("Load of a truncated file: %v", err)
	}
	if err := os.WriteFile(path, flip(headerLen+3), 0o644); err != nil {
		t.Fatal(err)
	}
	if _, _, err := Load(path, h.m); !errors.Is(err, ErrChecksum) {
		t.Errorf("Load of a corrupted file: %v", err)
	}
	if err := h.net.Save(path, 4); err != nil {
		t.Fatal(err)
	}
	if _, _, err := Load(path, u.m); !errors.Is(err, ErrScenario) {
		t.Errorf("Load for another scenario: %v", err)
	}
}

// A file too large to be a model is refused before it is read.
func TestLoadRefusesHugeFile(t *testing.T) {
	h := getFixture(t, "harbor")
	path := filepath.Join(t.TempDir(), "guess.bgm")
	fh, err := os.Create(path)
	if err != nil {
		t.Fatal(err)
	}
	// Sparse: 1 GB on paper, nothing on disk.
	if _, err := fh.WriteString(Magic); err != nil {
		t.Fatal(err)
	}
	if err := fh.Truncate(1 << 30); err != nil {
		t.Fatal(err)
	}
	fh.Close()
	n := fuzzcheck.Allocated(func() { _, _, err = Load(path, h.m) })
	if !errors.Is(err, ErrFormat) || !strings.Contains(err.Error(), path+": malformed guess model: 1073741824 bytes, more than the") {
		t.Errorf("Load of a 1 GB file: %v", err)
	}
	if n > 1<<20 {
		t.Errorf("refusing the file allocated %d bytes", n)
	}
}

// A model file of format 1 (from before in-order features) is refused with
// how to retrain.
func TestFormatOneRefused(t *testing.T) {
	fx := getFixture(t, "harbor")
	b, err := fx.net.Marshal(1)
	if err != nil {
		t.Fatal(err)
	}
	copy(b, "BATONGM1")
	_, _, err = Unmarshal(b)
	if !errors.Is(err, ErrFeatureVersion) || !strings.Contains(err.Error(), "retrain it (sim train") {
		t.Fatalf("%v", err)
	}
}
