package learn

import (
	"baton/sim/fuzzcheck"
	"bytes"
	"encoding/binary"
	"errors"
	"math"
	"reflect"
	"testing"

	"google.golang.org/protobuf/encoding/protowire"
	"google.golang.org/protobuf/proto"

	batonpb "baton/proto"
)

// fileSeeds are the fixtures' real model files, then ways of breaking one.
func fileSeeds(tb testing.TB, h, u *fixture) [][]byte {
	good, err := h.net.Marshal(3)
	if err != nil {
		tb.Fatal(err)
	}
	other, err := u.net.Marshal(1 << 40)
	if err != nil {
		tb.Fatal(err)
	}
	flip := func(i int) []byte {
		b := bytes.Clone(good)
		b[i] ^= 0x40
		return b
	}
	withLength := func(n uint32) []byte {
		b := bytes.Clone(good)
		binary.BigEndian.PutUint32(b[len(Magic):], n)
		return b
	}
	seeds := [][]byte{
		good, other,
		nil, good[:5], good[:len(Magic)], good[:headerLen], good[:len(good)/2], good[:len(good)-1],
		append(bytes.Clone(good), 0),
		flip(0), flip(headerLen + 20), flip(len(good) - 1),
		withLength(0), withLength(1), withLength(maxBody), withLength(maxBody + 1), withLength(math.MaxUint32),
		[]byte("levels: 3\nlevel_cost: [0, 1, 4, 12]\n"),
	}
	for _, body := range bodySeeds(tb, good) {
		seeds = append(seeds, frame(body))
	}
	return seeds
}

// bodySeeds are model contents, valid and not, taken from a real file.
func bodySeeds(tb testing.TB, good []byte) [][]byte {
	body := good[headerLen : len(good)-sumLen]
	edit := func(fn func(pb *batonpb.GuessModel)) []byte {
		var pb batonpb.GuessModel
		if err := proto.Unmarshal(body, &pb); err != nil {
			tb.Fatal(err)
		}
		fn(&pb)
		b, err := proto.MarshalOptions{Deterministic: true}.Marshal(&pb)
		if err != nil {
			tb.Fatal(err)
		}
		return b
	}
	// Repeated fields written one element at a time, as the wire format
	// allows: the decoder cannot size the slice in advance.
	unpacked := edit(func(pb *batonpb.GuessModel) { pb.InputMean = nil })
	for range 54 {
		unpacked = protowire.AppendTag(unpacked, 7, protowire.Fixed64Type)
		unpacked = protowire.AppendFixed64(unpacked, math.Float64bits(0.5))
	}
	// Small nets, as the refusal tests make them: mutations of a small input
	// are cheap to minimise, and the first fits the harbor fixture.
	small := func(scenario, version string, inputs int, hidden []int, outputs int, act Activation) []byte {
		n := newNet(inputs, hidden, outputs, act)
		n.meta.Scenario, n.meta.FeatureVersion = scenario, version
		for i := range n.params {
			n.params[i] = float64(i%7-3) / 4
		}
		b, err := n.Marshal(1)
		if err != nil {
			tb.Fatal(err)
		}
		return b[headerLen : len(b)-sumLen]
	}
	return [][]byte{
		body,
		small("harbor", "harbor.2", 59, []int{1}, 5, ReLU),
		small("", "", 1, []int{1}, 1, Tanh),
		small("upkeep", "upkeep.2", 2, []int{2, 2}, 3, ReLU),
		{},
		bytes.Repeat([]byte{0xff}, 40),
		unpacked,
		edit(func(pb *batonpb.GuessModel) { pb.Layers[0].Weights[3] = math.NaN() }),
		edit(func(pb *batonpb.GuessModel) { pb.InputScale[0] = math.Inf(1) }),
		edit(func(pb *batonpb.GuessModel) { pb.Layers = append(pb.Layers, pb.Layers...) }),
		edit(func(pb *batonpb.GuessModel) { pb.Layers = nil }),
		edit(func(pb *batonpb.GuessModel) { pb.Layers[1].Biases = pb.Layers[1].Biases[1:] }),
		edit(func(pb *batonpb.GuessModel) {
			pb.Layers[0].Inputs, pb.Layers[0].Outputs = math.MaxUint32, math.MaxUint32
		}),
		edit(func(pb *batonpb.GuessModel) { pb.Inputs, pb.InputMean, pb.InputScale = 0, nil, nil }),
		edit(func(pb *batonpb.GuessModel) { pb.Inputs = math.MaxUint32 }),
		edit(func(pb *batonpb.GuessModel) { pb.Outputs = 99 }),
		edit(func(pb *batonpb.GuessModel) { pb.Activation = 7 }),
		edit(func(pb *batonpb.GuessModel) { pb.Scenario, pb.FeatureVersion = "upkeep", "upkeep.2" }),
		edit(func(pb *batonpb.GuessModel) { pb.FeatureVersion = "harbor.0" }),
		edit(func(pb *batonpb.GuessModel) { pb.Training = nil }),
		// A layer count far over the limit, each layer two bytes.
		bytes.Repeat(protowire.AppendBytes(protowire.AppendTag(nil, 9, protowire.BytesType), nil), 1000),
		// Fields this build does not know.
		protowire.AppendBytes(protowire.AppendTag(bytes.Clone(body), 99, protowire.BytesType), make([]byte, 300)),
	}
}

var fileErrors = []error{ErrTruncated, ErrMagic, ErrChecksum, ErrFormat, ErrScenario, ErrFeatureVersion, ErrShape}

// No file panics, every refusal has exactly one kind, decoding stays within
// the documented allocation bound, and a net that is accepted re-encodes to
// itself and, once bound, predicts a valid control index.
func FuzzUnmarshal(f *testing.F) {
	h, u := getFixture(f, "harbor"), getFixture(f, "upkeep")
	for _, s := range fileSeeds(f, h, u) {
		f.Add(s)
	}
	f.Fuzz(func(t *testing.T, data []byte) { checkFile(t, data, h, u) })
}

// FuzzUnmarshalBody frames its input with a valid checksum, so mutations get
// past the checksum to the protobuf decoding and the shape checks.
func FuzzUnmarshalBody(f *testing.F) {
	h, u := getFixture(f, "harbor"), getFixture(f, "upkeep")
	good, err := h.net.Marshal(3)
	if err != nil {
		f.Fatal(err)
	}
	for _, b := range bodySeeds(f, good) {
		f.Add(b)
	}
	other, err := u.net.Marshal(3)
	if err != nil {
		f.Fatal(err)
	}
	f.Add(other[headerLen : len(other)-sumLen])
	f.Fuzz(func(t *testing.T, body []byte) { checkFile(t, frame(body), h, u) })
}

func checkFile(t *testing.T, data []byte, fixtures ...*fixture) {
	var n *Net
	var meta Meta
	var err error
	used := fuzzcheck.Allocated(func() { n, meta, err = Unmarshal(data) })
	if limit := uint64(AllocPerByte*len(data) + AllocFixed); used > limit {
		t.Fatalf("Unmarshal of %d bytes allocated %d, over the documented %d", len(data), used, limit)
	}
	if err != nil {
		oneKind(t, err)
	} else {
		again, err := n.Marshal(meta.Version)
		if err != nil {
			t.Fatalf("an accepted net does not re-encode: %v", err)
		}
		n2, meta2, err := Unmarshal(again)
		if err != nil || !reflect.DeepEqual(meta, meta2) || !reflect.DeepEqual(n.params, n2.params) ||
			!reflect.DeepEqual(n.mean, n2.mean) || !reflect.DeepEqual(n.scale, n2.scale) {
			t.Fatalf("re-encoding changed the net: %v\n%+v\n%+v", err, meta, meta2)
		}
	}
	for _, fx := range fixtures {
		var bound *Net
		used := fuzzcheck.Allocated(func() { bound, _, err = Check(data, fx.m) })
		if limit := uint64(AllocPerByte*len(data) + AllocFixed); used > limit {
			t.Fatalf("Check of %d bytes allocated %d, over the documented %d", len(data), used, limit)
		}
		if err != nil {
			oneKind(t, err)
			continue
		}
		if c := bound.Predict(fx.states[0], 0, 0); c < 0 || c >= fx.m.MaxControls() {
			t.Fatalf("predicted control %d of %d", c, fx.m.MaxControls())
		}
	}
}

func oneKind(t *testing.T, err error) {
	t.Helper()
	kinds := 0
	for _, k := range fileErrors {
		if errors.Is(err, k) {
			kinds++
		}
	}
	if kinds != 1 {
		t.Fatalf("refusal matches %d kinds: %v", kinds, err)
	}
}
