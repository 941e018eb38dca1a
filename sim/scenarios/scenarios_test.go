package scenarios

import (
	"slices"
	"strings"
	"testing"

	"baton/sim/harbor"
	"baton/sim/model"
)

// A scenario registered from outside is known to every command: listed,
// loaded by name, its files refused when it reads none; a name taken
// twice is a programming error.
func TestRegister(t *testing.T) {
	Register("test-grid", Scenario{Default: func(r int) (model.Model, error) { return harbor.Default(r) }, Help: "a test"})
	if !slices.Contains(Names(), "test-grid") || !strings.Contains(Help(), "a test") {
		t.Fatalf("%v", Names())
	}
	m, err := Load("test-grid", "", 3)
	if err != nil || m.Robots() != 3 {
		t.Fatalf("%v %v", m, err)
	}
	if _, err := Load("test-grid", "x.yaml", 3); err == nil || !strings.Contains(err.Error(), "reads no files") {
		t.Fatalf("file: %v", err)
	}
	for _, bad := range []func(){
		func() { Register("test-grid", Scenario{Default: func(int) (model.Model, error) { return nil, nil }}) },
		func() { Register("harbor", Scenario{Default: func(int) (model.Model, error) { return nil, nil }}) },
		func() { Register("no-default", Scenario{}) },
		func() { Register("a b", Scenario{Default: func(int) (model.Model, error) { return nil, nil }}) },
	} {
		func() {
			defer func() {
				if recover() == nil {
					t.Error("no panic")
				}
			}()
			bad()
		}()
	}
}
