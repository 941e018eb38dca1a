package learn

import (
	"bytes"
	"crypto/sha256"
	"encoding/binary"
	"errors"
	"fmt"
	"io"
	"math"
	"os"
	"path/filepath"

	"google.golang.org/protobuf/encoding/protowire"
	"google.golang.org/protobuf/proto"

	batonpb "baton/proto"
	"baton/sim/model"
)

// Magic starts every guess model file.
const Magic = "BATONGM2"

// oldMagic marks format 1 files: nets whose features did not see the
// predecessors' controls (guessing in order came with format 2).
const oldMagic = "BATONGM1"

const (
	headerLen = len(Magic) + 4
	sumLen    = sha256.Size
	// maxBody bounds the length field, so a corrupted one cannot make a
	// reader try to hold gigabytes; real models are a few tens of kB.
	maxBody = 64 << 20
	// maxLayers is what Train builds: one or two hidden layers and the
	// output layer.
	maxLayers = 3
)

// MaxFileBytes is the largest model file: the header, at most 64 MB of
// contents and the checksum. Load checks the size before reading.
const MaxFileBytes = headerLen + maxBody + sumLen

// The documented allocation bound of one Unmarshal or Check of n bytes:
// AllocPerByte*n + AllocFixed. Nothing is sized by the length field (it is
// checked against the data first) or by the declared layer sizes (they are
// checked against the weights actually decoded); layers are counted before
// decoding, since an empty one is two bytes that decode to a hundred. What
// remains is the decoding itself, where values written one at a time (or
// fields this build does not know) are appended, about 5 bytes allocated
// per byte as the slice grows, and the copy of the weights into the net.
const (
	AllocPerByte = 8
	AllocFixed   = 1 << 20
)

// Errors a model file is refused with; test with errors.Is.
var (
	ErrTruncated      = errors.New("truncated")
	ErrMagic          = errors.New("bad magic")
	ErrChecksum       = errors.New("checksum mismatch")
	ErrFormat         = errors.New("malformed guess model")
	ErrScenario       = errors.New("wrong scenario")
	ErrFeatureVersion = errors.New("wrong feature version")
	ErrShape          = errors.New("shape mismatch")
)

// fileError reads as its own message and matches its kind with errors.Is.
type fileError struct {
	kind error
	msg  string
}

func (e *fileError) Error() string { return e.msg }
func (e *fileError) Unwrap() error { return e.kind }

func refuse(kind error, format string, args ...any) error {
	return &fileError{kind: kind, msg: fmt.Sprintf(format, args...)}
}

// Marshal encodes the net as a framed model file with the given
// distribution version. Equal nets give equal bytes.
func (n *Net) Marshal(version uint64) ([]byte, error) {
	meta := n.meta
	meta.Version = version
	pb := &batonpb.GuessModel{
		Scenario:       meta.Scenario,
		FeatureVersion: meta.FeatureVersion,
		RobotsTrained:  uint32(meta.RobotsTrained),
		Inputs:         uint32(n.Inputs()),
		Outputs:        uint32(n.Outputs()),
		Activation:     activationPB(n.act),
		InputMean:      n.mean,
		InputScale:     n.scale,
		Version:        version,
		CreatedBy:      meta.CreatedBy,
		Training: &batonpb.TrainingInfo{
			Seed:             meta.Seed,
			Samples:          uint32(meta.Samples),
			Episodes:         uint32(meta.Episodes),
			Epochs:           uint32(meta.Epochs),
			Batch:            uint32(meta.Batch),
			LearningRate:     meta.LearningRate,
			WeightDecay:      meta.WeightDecay,
			FinalLoss:        meta.FinalLoss,
			TrainAccuracy:    meta.TrainAccuracy,
			TestSamples:      uint32(meta.TestSamples),
			TestAccuracy:     meta.TestAccuracy,
			TestMajorityRate: meta.TestMajorityRate,
		},
	}
	for _, l := range n.layers {
		pb.Layers = append(pb.Layers, &batonpb.Layer{Inputs: uint32(l.in), Outputs: uint32(l.out), Weights: l.w, Biases: l.b})
	}
	body, err := proto.MarshalOptions{Deterministic: true}.Marshal(pb)
	if err != nil {
		return nil, fmt.Errorf("learn: encode guess model: %w", err)
	}
	if len(body) > maxBody {
		return nil, fmt.Errorf("learn: guess model is %d bytes, more than the %d a file may hold", len(body), maxBody)
	}
	out := make([]byte, 0, headerLen+len(body)+sumLen)
	out = append(out, Magic...)
	out = binary.BigEndian.AppendUint32(out, uint32(len(body)))
	out = append(out, body...)
	sum := sha256.Sum256(body)
	return append(out, sum[:]...), nil
}

func activationPB(a Activation) batonpb.Activation {
	if a == ReLU {
		return batonpb.Activation_ACTIVATION_RELU
	}
	return batonpb.Activation_ACTIVATION_TANH
}

// Unmarshal decodes and verifies a model file: framing, checksum and the
// net's internal consistency. The net is not bound to a model: it can
// measure Accuracy but not Predict; Check and Load bind it.
func Unmarshal(data []byte) (*Net, Meta, error) {
	if len(data) < len(Magic) {
		if bytes.HasPrefix([]byte(Magic), data) {
			return nil, Meta{}, refuse(ErrTruncated, "truncated: %d bytes, not even the %d-byte magic", len(data), len(Magic))
		}
		return nil, Meta{}, refuse(ErrMagic, "bad magic: not a guess model file (starts %q, want %q)", data, Magic)
	}
	if string(data[:len(Magic)]) == oldMagic {
		return nil, Meta{}, refuse(ErrFeatureVersion, "a format 1 guess model, from before guesses were made in turn order: retrain it (sim train --scenario S --robots N --out FILE)")
	}
	if string(data[:len(Magic)]) != Magic {
		return nil, Meta{}, refuse(ErrMagic, "bad magic: not a guess model file (starts %q, want %q)", data[:len(Magic)], Magic)
	}
	if len(data) > MaxFileBytes {
		return nil, Meta{}, refuse(ErrFormat, "%v: %d bytes, more than the %d a model file may hold", ErrFormat, len(data), MaxFileBytes)
	}
	if len(data) < headerLen {
		return nil, Meta{}, refuse(ErrTruncated, "truncated: %d bytes, the header alone is %d", len(data), headerLen)
	}
	size := binary.BigEndian.Uint32(data[len(Magic):headerLen])
	if size > maxBody {
		return nil, Meta{}, refuse(ErrFormat, "%v: length field says %d bytes, more than the %d allowed", ErrFormat, size, maxBody)
	}
	want := headerLen + int(size) + sumLen
	if len(data) < want {
		return nil, Meta{}, refuse(ErrTruncated, "truncated: %d bytes, the header promises %d", len(data), want)
	}
	if len(data) > want {
		return nil, Meta{}, refuse(ErrFormat, "%v: %d bytes after the checksum", ErrFormat, len(data)-want)
	}
	body := data[headerLen : headerLen+int(size)]
	sum := sha256.Sum256(body)
	if stored := data[headerLen+int(size):]; !bytes.Equal(sum[:], stored) {
		return nil, Meta{}, refuse(ErrChecksum, "checksum mismatch: stored %x, contents hash to %x", stored, sum)
	}
	if countLayers(body) > maxLayers {
		return nil, Meta{}, refuse(ErrShape, "shape mismatch: more than %d layers", maxLayers)
	}
	var pb batonpb.GuessModel
	if err := proto.Unmarshal(body, &pb); err != nil {
		return nil, Meta{}, refuse(ErrFormat, "%v: %v", ErrFormat, err)
	}
	n, err := fromPB(&pb)
	if err != nil {
		return nil, Meta{}, err
	}
	return n, n.Meta(), nil
}

// countLayers counts the layers in a GuessModel's encoding without
// decoding it: decoded, each layer costs a hundred bytes or so, and can be
// written in two. It stops counting past maxLayers, and at anything
// malformed, which proto.Unmarshal then reports.
func countLayers(body []byte) int {
	layers := 0
	for len(body) > 0 && layers <= maxLayers {
		num, typ, n := protowire.ConsumeTag(body)
		if n < 0 {
			break
		}
		body = body[n:]
		if num == layersField {
			layers++
		}
		n = protowire.ConsumeFieldValue(num, typ, body)
		if n < 0 {
			break
		}
		body = body[n:]
	}
	return layers
}

// layersField is GuessModel.layers' field number (proto/model.proto).
const layersField = 9

// fromPB checks that the layers chain from inputs to outputs with the
// right number of finite weights, and builds the net.
func fromPB(pb *batonpb.GuessModel) (*Net, error) {
	inputs, outputs := int(pb.Inputs), int(pb.Outputs)
	if inputs < 1 || outputs < 1 || len(pb.Layers) < 1 || len(pb.Layers) > maxLayers {
		return nil, refuse(ErrShape, "shape mismatch: %d inputs, %d outputs, %d layers", inputs, outputs, len(pb.Layers))
	}
	var act Activation
	switch pb.Activation {
	case batonpb.Activation_ACTIVATION_TANH:
		act = Tanh
	case batonpb.Activation_ACTIVATION_RELU:
		act = ReLU
	default:
		return nil, refuse(ErrFormat, "%v: unknown activation %v", ErrFormat, pb.Activation)
	}
	if len(pb.InputMean) != inputs || len(pb.InputScale) != inputs {
		return nil, refuse(ErrShape, "shape mismatch: %d inputs but %d means and %d scales", inputs, len(pb.InputMean), len(pb.InputScale))
	}
	var hidden []int
	prev := inputs
	for i, l := range pb.Layers {
		in, out := int(l.Inputs), int(l.Outputs)
		if in != prev || out < 1 || len(l.Weights) != in*out || len(l.Biases) != out {
			return nil, refuse(ErrShape, "shape mismatch: layer %d is %dx%d with %d weights and %d biases, after a layer of %d",
				i, in, out, len(l.Weights), len(l.Biases), prev)
		}
		if i < len(pb.Layers)-1 {
			hidden = append(hidden, out)
		}
		prev = out
	}
	if prev != outputs {
		return nil, refuse(ErrShape, "shape mismatch: last layer has %d outputs, the model says %d", prev, outputs)
	}
	n := newNet(inputs, hidden, outputs, act)
	copy(n.mean, pb.InputMean)
	copy(n.scale, pb.InputScale)
	for i, l := range pb.Layers {
		copy(n.layers[i].w, l.Weights)
		copy(n.layers[i].b, l.Biases)
	}
	for _, v := range [][]float64{n.params, n.mean, n.scale} {
		for _, x := range v {
			if math.IsNaN(x) || math.IsInf(x, 0) {
				return nil, refuse(ErrFormat, "%v: non-finite parameter", ErrFormat)
			}
		}
	}
	n.meta.Scenario, n.meta.FeatureVersion = pb.Scenario, pb.FeatureVersion
	n.meta.RobotsTrained = int(pb.RobotsTrained)
	n.meta.Version, n.meta.CreatedBy = pb.Version, pb.CreatedBy
	if t := pb.Training; t != nil {
		n.meta.Seed, n.meta.Samples, n.meta.Episodes = t.Seed, int(t.Samples), int(t.Episodes)
		n.meta.Epochs, n.meta.Batch = int(t.Epochs), int(t.Batch)
		n.meta.LearningRate, n.meta.WeightDecay = t.LearningRate, t.WeightDecay
		n.meta.FinalLoss, n.meta.TrainAccuracy = t.FinalLoss, t.TrainAccuracy
		n.meta.TestSamples, n.meta.TestAccuracy, n.meta.TestMajorityRate = int(t.TestSamples), t.TestAccuracy, t.TestMajorityRate
	}
	return n, nil
}

// Check is Unmarshal followed by the checks against the fleet's model m:
// same scenario, same feature version, input and output sizes that fit m's
// features and controls. The returned net is bound to m and ready to
// Predict. Use it on a model that arrived over the network.
func Check(data []byte, m model.Model) (*Net, Meta, error) {
	n, meta, err := Unmarshal(data)
	if err != nil {
		return nil, Meta{}, err
	}
	if n, err = n.boundTo(m); err != nil {
		return nil, Meta{}, err
	}
	return n, meta, nil
}

// boundTo returns a net sharing n's (read-only) weights, bound to m's
// features, after checking that the two fit.
func (n *Net) boundTo(m model.Model) (*Net, error) {
	if lb, ok := m.(learnedBase); ok {
		m = lb.inner()
	}
	if n.meta.Scenario != m.Name() {
		return nil, refuse(ErrScenario, "model is for scenario %s, this fleet runs %s", n.meta.Scenario, m.Name())
	}
	f, err := FeaturizerFor(m)
	if err != nil {
		return nil, err
	}
	if n.meta.FeatureVersion != f.Version() {
		return nil, refuse(ErrFeatureVersion, "model uses feature version %q, this build computes %q: retrain it (sim train --scenario %s --robots N --out FILE)",
			n.meta.FeatureVersion, f.Version(), f.Scenario())
	}
	if n.Inputs() != f.Size() {
		return nil, refuse(ErrShape, "shape mismatch: model takes %d inputs, this fleet's features have %d", n.Inputs(), f.Size())
	}
	if n.Outputs() != m.MaxControls() {
		return nil, refuse(ErrShape, "shape mismatch: model scores %d controls, this fleet has up to %d", n.Outputs(), m.MaxControls())
	}
	b := &Net{meta: n.meta, act: n.act, mean: n.mean, scale: n.scale, params: n.params, layers: n.layers}
	b.pool.New = func() any { return b.newScratch() }
	b.bind(f)
	if b.m == nil {
		b.m = m // a registered scenario's featurizer: mask with the model bound to
	}
	return b, nil
}

// Save writes the model file atomically: a temporary file in the same
// directory, synced, then renamed over path, so a reader never sees half a
// model.
func (n *Net) Save(path string, version uint64) (err error) {
	data, err := n.Marshal(version)
	if err != nil {
		return err
	}
	tmp, err := os.CreateTemp(filepath.Dir(path), "."+filepath.Base(path)+".tmp-*")
	if err != nil {
		return fmt.Errorf("learn: save guess model: %w", err)
	}
	defer func() {
		if err != nil {
			os.Remove(tmp.Name())
		}
	}()
	if _, err = tmp.Write(data); err == nil {
		err = tmp.Sync()
	}
	if cerr := tmp.Close(); err == nil {
		err = cerr
	}
	if err == nil {
		err = os.Chmod(tmp.Name(), 0o644)
	}
	if err == nil {
		err = os.Rename(tmp.Name(), path)
	}
	if err != nil {
		return fmt.Errorf("learn: save guess model: %w", err)
	}
	return nil
}

// Load reads a model file and checks it against m as Check does; the
// refusal says which check failed and is prefixed with the path. A file
// over MaxFileBytes is refused before it is read.
func Load(path string, m model.Model) (*Net, Meta, error) {
	data, err := readModel(path)
	if err != nil {
		return nil, Meta{}, err
	}
	n, meta, err := Check(data, m)
	if err != nil {
		return nil, Meta{}, fmt.Errorf("%s: %w", path, err)
	}
	return n, meta, nil
}

// readModel reads a model file whole, refusing one over MaxFileBytes
// before reading it.
func readModel(path string) ([]byte, error) {
	f, err := os.Open(path)
	if err != nil {
		return nil, fmt.Errorf("learn: load guess model: %w", err)
	}
	defer f.Close()
	if fi, err := f.Stat(); err == nil && fi.Mode().IsRegular() && fi.Size() > int64(MaxFileBytes) {
		return nil, fmt.Errorf("%s: %w", path, refuse(ErrFormat, "%v: %d bytes, more than the %d a model file may hold", ErrFormat, fi.Size(), MaxFileBytes))
	}
	// A pipe has no size, and a file can grow after Stat: read one byte
	// past the limit to tell.
	data, err := io.ReadAll(io.LimitReader(f, int64(MaxFileBytes)+1))
	if err != nil {
		return nil, fmt.Errorf("learn: load guess model: %w", err)
	}
	if len(data) > MaxFileBytes {
		return nil, fmt.Errorf("%s: %w", path, refuse(ErrFormat, "%v: more than the %d bytes a model file may hold", ErrFormat, MaxFileBytes))
	}
	return data, nil
}
