package harbor

import (
	"baton/sim/fuzzcheck"
	"os"
	"strings"
	"testing"

	"baton/sim/config"
	"baton/sim/model"
)

// parseSeeds are edge cases of the harbor format; FuzzParse adds the
// example file.
var parseSeeds = []string{
	"",
	"width: 4\n",
	// Every list and size at its limit, and just past it.
	"width: 1000\nheight: 1000\nrobots: 256\nslicks: 1000\nhorizon: 100000\n",
	"width: 1001\n",
	"height: 1001\n",
	"robots: 257\n",
	"slicks: 1001\n",
	"horizon: 100001\n",
	"width: 1\nheight: 1\n",
	"width: 1\nheight: 2\nrobots: 1\nslicks: 1\n",
	"width: -1\nheight: -1\n",
	"width: 9223372036854775807\nheight: 9223372036854775807\n",
	"width: 99999999999999999999\n",
	"width: 2.5\n",
	// Probabilities and weights that are not numbers.
	"drift: .nan\n",
	"drift: -0\ncurrent_bias: 1e308\n",
	"current_bias: .inf\n",
	"discount: .nan\n",
	"current: e\n",
	"current: NS\n",
	// Cells: outside, short, long, and lists that disagree with counts.
	"dock: [-1, 0]\n",
	"dock: [0]\n",
	"dock: [0, 0, 0]\n",
	"robots: 2\nstarts: [[0, 0], [9, 9]]\n",
	"starts: [[0, 0], [1, 1], [2, 2], [3, 3]]\nscatter: true\n",
	"slick_cells: [[0, 0], [1, 1]]\n",
	"slicks: 3\nslick_cells: [[0, 0]]\n",
	"width: 2\nheight: 1\nrobots: 2\nstarts: [[0, 0], [1, 0]]\nslicks: 1\n",
	// Not a harbor.
	"width: &w 4\nheight: *w\n",
	"width: 4\nwidth: 5\n",
	"levels: 3\n",
	"- width: 4\n",
	"width: [4\n",
}

// No file panics, every problem names the file, a parse stays within the
// documented allocation bound, and whatever parses is a harbor the model
// can start and step.
func FuzzParse(f *testing.F) {
	example, err := os.ReadFile("../../deploy/examples/harbor-tiny.yaml")
	if err != nil {
		f.Fatal(err)
	}
	f.Add(example, 0)
	for _, robots := range []int{1, 2, 3, 256, 257, -1, 1 << 40} {
		f.Add(example, robots)
	}
	for _, s := range parseSeeds {
		f.Add([]byte(s), 0)
	}
	f.Fuzz(func(t *testing.T, data []byte, robots int) {
		var m *Model
		var err error
		n := fuzzcheck.Allocated(func() { m, err = Parse("h.yaml", data, robots) })
		if limit := uint64(config.AllocPerByte*len(data) + config.AllocFixed); n > limit {
			t.Fatalf("parsing %d bytes allocated %d, over the documented %d", len(data), n, limit)
		}
		if err != nil {
			if !strings.HasPrefix(err.Error(), "h.yaml:") {
				t.Fatalf("error does not name the file: %v", err)
			}
			return
		}
		if err := m.Config().Validate(nil); err != nil {
			t.Fatalf("parsed an invalid harbor: %v", err)
		}
		if robots > 0 && m.Robots() != robots {
			t.Fatalf("%d boats, %d asked for", m.Robots(), robots)
		}
		s := m.NewState()
		m.Start(s, model.NewRNG(1).Rand)
		u := make([]int, m.Robots())
		model.BaseJoint(m, s, u)
		m.Step(s, u, model.NewRNG(2).Rand)
	})
}
