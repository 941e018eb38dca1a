package delivery

import (
	"baton/signal/learn"
	"baton/sim/model"
	"baton/sim/scenarios"
)

// Importing the package is all an integrator's binaries do to know the
// scenario: init registers it under "delivery" with Baton's commands
// (--scenario delivery [--config FILE]) and its features for learned
// guesses (--guess learned, sim train).
func init() {
	scenarios.Register("delivery", scenarios.Scenario{
		Default: func(robots int) (model.Model, error) { return Default(robots) },
		Load:    func(path string, robots int) (model.Model, error) { return Load(path, robots) },
		Help:    "delivery robots carry parcels between stations on a road graph (example module)",
		// --starts and a fleet file's robots' start: station names.
		Starts: func(m model.Model, starts []string) (model.Model, error) { return m.(*Model).WithStarts(starts) },
	})
	learn.RegisterFeatures("delivery", NewFeatures)
}
