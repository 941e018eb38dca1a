package shell

import (
	"fmt"
	"os"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"time"

	"baton/sim/config"
	"baton/sim/scenarios"
)

// FleetFile is one fleet's file (--fleet-file): what the coordinator, each
// agentd and `sim fleet` need, in one place. Every command turns it into
// its own flags, and flags given on the command line come after, so they
// win. Relative paths in it are relative to the file. deploy/examples/
// fleet.yaml is a commented example.
type FleetFile struct {
	Fleet       string           `yaml:"fleet"`
	Prefix      string           `yaml:"prefix"`
	NATS        FleetNATS        `yaml:"nats"`
	Gossip      FleetGossip      `yaml:"gossip"`
	Scenario    string           `yaml:"scenario"`
	Site        string           `yaml:"site"`
	Robots      []FleetRobot     `yaml:"robots"`
	Rounds      FleetRounds      `yaml:"rounds"`
	Guess       FleetGuess       `yaml:"guess"`
	Coordinator FleetCoordinator `yaml:"coordinator"`
	Logs        FleetLogs        `yaml:"logs"`

	dir string
}

// FleetNATS is how every process reaches the bus.
type FleetNATS struct {
	URLs []string `yaml:"urls"`
	// CredsDir holds what `sim creds` wrote: coordinator.nk, robot-<r>.nk.
	CredsDir string `yaml:"creds_dir"`
	TLSCA    string `yaml:"tls_ca"`
	TLSCert  string `yaml:"tls_cert"`
	TLSKey   string `yaml:"tls_key"`
}

// FleetGossip is the fleet's membership.
type FleetGossip struct {
	KeyFile string `yaml:"key_file"`
	// Join is the coordinator's gossip address, which robots join.
	Join string `yaml:"join"`
}

// FleetRobot is one robot.
type FleetRobot struct {
	ID   int    `yaml:"id"`
	Name string `yaml:"name"`
	// Start is its start position in the scenario's terms (harbor: "x,y";
	// upkeep: a site name); all robots or none give one.
	Start string `yaml:"start"`
	// HTTP is its local interface address; TokenFile the token it then
	// requires (needed off localhost); Gossip its gossip bind address.
	HTTP      string `yaml:"http"`
	TokenFile string `yaml:"http_token_file"`
	Gossip    string `yaml:"gossip"`
}

// FleetRounds is the round clock and the rollout effort.
type FleetRounds struct {
	Mode            string `yaml:"mode"`
	TurnDeadline    string `yaml:"turn_deadline"`
	Period          string `yaml:"period"`
	ReportWait      string `yaml:"report_wait"`
	FirstReportWait string `yaml:"first_report_wait"`
	Stale           string `yaml:"stale"`
	Samples         int    `yaml:"samples"`
	Horizon         int    `yaml:"horizon"`
	Seed            uint64 `yaml:"seed"`
	Count           int    `yaml:"count"`
}

// FleetGuess is what robots assume about predecessors they did not hear.
type FleetGuess struct {
	Source string `yaml:"source"`
	Model  string `yaml:"model"`
}

// FleetCoordinator is the coordinator's own addresses and log copies.
type FleetCoordinator struct {
	HTTP        string `yaml:"http"`
	Gossip      string `yaml:"gossip"`
	LogReplicas int    `yaml:"log_replicas"`
}

// FleetLogs says where logs go.
type FleetLogs struct {
	DecisionLog string `yaml:"decision_log"`
	// Dir is where `sim fleet` keeps its processes' logs.
	Dir   string `yaml:"dir"`
	Level string `yaml:"level"`
	JSON  bool   `yaml:"json"`
}

// Roles a fleet file is read for.
const (
	RoleCoordinator = "coordinator"
	RoleAgentd      = "agentd"
	RoleSim         = "sim fleet"
)

// LoadFleetFile reads and checks a fleet file; errors read
// FILE:LINE: FIELD: message.
func LoadFleetFile(path string) (*FleetFile, error) {
	var f FleetFile
	doc, err := config.ReadFile(path, &f)
	if err != nil {
		return nil, err
	}
	f.dir = filepath.Dir(path)
	if err := f.check(doc); err != nil {
		return nil, err
	}
	for _, p := range []struct{ field, path string }{{"site", f.Site}, {"guess.model", f.Guess.Model}} {
		if p.path == "" {
			continue
		}
		if _, err := os.Stat(f.path(p.path)); err != nil {
			return nil, doc.Errorf(p.field, "%s: no such file (relative paths are relative to the fleet file)", f.path(p.path))
		}
	}
	return &f, nil
}

func (f *FleetFile) check(doc *config.Doc) error {
	switch {
	case f.Fleet == "":
		return doc.Errorf("fleet", "required: the fleet's id")
	case f.Scenario == "":
		return doc.Errorf("scenario", "required: one of %s", strings.Join(scenarios.Names(), ", "))
	case !slices.Contains(scenarios.Names(), f.Scenario):
		return doc.Errorf("scenario", "unknown scenario %q (known: %s)", f.Scenario, strings.Join(scenarios.Names(), ", "))
	case len(f.Robots) == 0:
		return doc.Errorf("robots", "list every robot (id, name)")
	}
	ids := map[int]bool{}
	names := map[string]bool{}
	starts := 0
	for i, r := range f.Robots {
		field := fmt.Sprintf("robots[%d]", i)
		switch {
		case r.ID < 0 || r.ID >= len(f.Robots):
			return doc.Errorf(field+".id", "robot id %d: ids are 0..%d, one per robot", r.ID, len(f.Robots)-1)
		case ids[r.ID]:
			return doc.Errorf(field+".id", "robot id %d listed twice", r.ID)
		case r.Name != "" && names[r.Name]:
			return doc.Errorf(field+".name", "name %q given to two robots", r.Name)
		case strings.Contains(r.Start, ";"):
			return doc.Errorf(field+".start", "%q: one position per robot", r.Start)
		}
		ids[r.ID], names[r.Name] = true, r.Name != ""
		if r.Start != "" {
			starts++
		}
	}
	if starts != 0 && starts != len(f.Robots) {
		return doc.Errorf("robots", "%d of %d robots give a start position: all or none", starts, len(f.Robots))
	}
	for _, d := range []struct{ field, v string }{{"rounds.turn_deadline", f.Rounds.TurnDeadline}, {"rounds.period", f.Rounds.Period},
		{"rounds.report_wait", f.Rounds.ReportWait}, {"rounds.first_report_wait", f.Rounds.FirstReportWait}, {"rounds.stale", f.Rounds.Stale}} {
		if d.v == "" {
			continue
		}
		if v, err := time.ParseDuration(d.v); err != nil || v < 0 {
			return doc.Errorf(d.field, "%q is not a duration (e.g. 200ms, 2s)", d.v)
		}
	}
	if m := f.Rounds.Mode; m != "" && !slices.Contains([]string{"sequential", "parallel", "hybrid", "auto"}, m) {
		return doc.Errorf("rounds.mode", "%q: use sequential, parallel, hybrid or auto", m)
	}
	if f.Coordinator.LogReplicas < 0 || f.Coordinator.LogReplicas > 5 {
		return doc.Errorf("coordinator.log_replicas", "%d: want 1..5", f.Coordinator.LogReplicas)
	}
	return nil
}

// path resolves p against the file's directory.
func (f *FleetFile) path(p string) string {
	if p == "" || filepath.IsAbs(p) {
		return p
	}
	return filepath.Join(f.dir, p)
}

// robot is robot id's entry.
func (f *FleetFile) robot(id int) (FleetRobot, bool) {
	for _, r := range f.Robots {
		if r.ID == id {
			return r, true
		}
	}
	return FleetRobot{}, false
}

// Args are the flags the file sets for role (robot: agentd's robot id).
func (f *FleetFile) Args(role string, robot int) ([]string, error) {
	var out []string
	add := func(flag, v string) {
		if v != "" {
			out = append(out, "--"+flag+"="+v)
		}
	}
	addInt := func(flag string, v int) {
		if v != 0 {
			add(flag, strconv.Itoa(v))
		}
	}
	add("fleet", f.Fleet)
	add("prefix", f.Prefix)
	add("scenario", f.Scenario)
	add("config", f.path(f.Site))
	addInt("robots", len(f.Robots))
	if f.Robots[0].Start != "" {
		starts := make([]string, len(f.Robots))
		for _, r := range f.Robots {
			starts[r.ID] = r.Start
		}
		add("starts", strings.Join(starts, ";"))
	}
	add("guess", f.Guess.Source)
	add("guess-model", f.path(f.Guess.Model))
	if role != RoleSim {
		add("nats", strings.Join(f.NATS.URLs, ","))
		add("tls-ca", f.path(f.NATS.TLSCA))
		add("tls-cert", f.path(f.NATS.TLSCert))
		add("tls-key", f.path(f.NATS.TLSKey))
		add("gossip-key-file", f.path(f.Gossip.KeyFile))
		add("log-level", f.Logs.Level)
		if f.Logs.JSON {
			add("log-json", "true")
		}
	}
	if role != RoleAgentd {
		add("mode", f.Rounds.Mode)
		add("turn-deadline", f.Rounds.TurnDeadline)
		add("period", f.Rounds.Period)
		add("report-wait", f.Rounds.ReportWait)
		add("first-report-wait", f.Rounds.FirstReportWait)
		addInt("samples", f.Rounds.Samples)
		addInt("horizon", f.Rounds.Horizon)
		addInt("rounds", f.Rounds.Count)
	}
	switch role {
	case RoleCoordinator:
		if f.NATS.CredsDir != "" {
			add("creds", filepath.Join(f.path(f.NATS.CredsDir), "coordinator.nk"))
		}
		if f.Rounds.Seed != 0 {
			add("seed", strconv.FormatUint(f.Rounds.Seed, 10))
		}
		add("http", f.Coordinator.HTTP)
		add("gossip", f.Coordinator.Gossip)
		addInt("log-replicas", f.Coordinator.LogReplicas)
		add("decision-log", f.path(f.Logs.DecisionLog))
	case RoleAgentd:
		r, ok := f.robot(robot)
		if !ok {
			return nil, fmt.Errorf("robot %d is not in the fleet file (robots 0..%d)", robot, len(f.Robots)-1)
		}
		if f.NATS.CredsDir != "" {
			add("creds", filepath.Join(f.path(f.NATS.CredsDir), fmt.Sprintf("robot-%d.nk", robot)))
		}
		add("stale", f.Rounds.Stale)
		add("join", f.Gossip.Join)
		add("gossip", r.Gossip)
		add("http", r.HTTP)
		add("http-token-file", f.path(r.TokenFile))
		add("robot-name", r.Name)
	case RoleSim:
		add("logs", f.path(f.Logs.Dir))
	}
	return out, nil
}

// ExpandFleetFile puts the flags of the file named by --fleet-file in args
// (if any) before args, so what the command line gives wins. For agentd,
// the robot is the command line's --robot.
func ExpandFleetFile(args []string, role string) ([]string, error) {
	file, rest := flagValue(args, "fleet-file"), withoutFlag(args, "fleet-file")
	if file == "" {
		return args, nil
	}
	n := 0
	for _, a := range args {
		if k, _, _ := strings.Cut(strings.TrimLeft(a, "-"), "="); strings.HasPrefix(a, "-") && k == "fleet-file" {
			n++
		}
	}
	if n > 1 {
		return nil, fmt.Errorf("--fleet-file given %d times: one fleet, one file", n)
	}
	f, err := LoadFleetFile(file)
	if err != nil {
		return nil, fmt.Errorf("--fleet-file: %w", err)
	}
	robot := -1
	if role == RoleAgentd {
		v := flagValue(args, "robot")
		if v == "" {
			return nil, fmt.Errorf("--fleet-file %s: give --robot ID too (which robot of the fleet this is)", file)
		}
		if robot, err = strconv.Atoi(v); err != nil {
			return nil, fmt.Errorf("--robot %q: not a robot id", v)
		}
	}
	// A robot count on the command line that is not the file's would
	// make the file's robots (ids, names, starts) wrong: a conflict, not
	// an override.
	if v := flagValue(rest, "robots"); v != "" && v != strconv.Itoa(len(f.Robots)) {
		return nil, fmt.Errorf("--robots %s conflicts with --fleet-file %s, which lists %d robots: change the file's robots instead", v, file, len(f.Robots))
	}
	fileArgs, err := f.Args(role, robot)
	if err != nil {
		return nil, fmt.Errorf("--fleet-file %s: %w", file, err)
	}
	return append(fileArgs, rest...), nil
}

// flagValue is the value of -name/--name VALUE or --name=VALUE in args
// (the last one given; "" when absent), before any "--".
func flagValue(args []string, name string) string {
	var val string
	for i := 0; i < len(args) && args[i] != "--"; i++ {
		k, v, hasV := strings.Cut(strings.TrimLeft(args[i], "-"), "=")
		if !strings.HasPrefix(args[i], "-") || k != name {
			continue
		}
		switch {
		case hasV:
			val = v
		case i+1 < len(args):
			val = args[i+1]
			i++
		}
	}
	return val
}

// withoutFlag is args without -name/--name VALUE and --name=VALUE.
func withoutFlag(args []string, name string) []string {
	var out []string
	for i := 0; i < len(args); i++ {
		if args[i] == "--" {
			return append(out, args[i:]...)
		}
		k, _, hasV := strings.Cut(strings.TrimLeft(args[i], "-"), "=")
		if !strings.HasPrefix(args[i], "-") || k != name {
			out = append(out, args[i])
			continue
		}
		if !hasV {
			i++ // its value
		}
	}
	return out
}
