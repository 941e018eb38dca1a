// Command robot is an example of a robot's own software: a simulated robot
// that drives itself through its agentd's local interface with the Go
// client (baton/agentd/client). Each round it reads its decision, carries
// it out on its own simulated position (or stays, when the decision is a
// hold), reports where it is and what it did, and prints one line.
//
// One robot alone cannot simulate the shared world, so it keeps only its
// own position, as the scenario defines it (harbor: a grid cell; upkeep: a
// site of the site graph), and reports no sightings: a real robot reports
// what its sensors saw (README, "The robot's local interface").
//
//	go run ./examples/robot --agentd http://127.0.0.1:7400 --scenario harbor --robot 2 --rounds 20
package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"os/signal"
	"strconv"
	"strings"
	"syscall"

	"baton/agentd/client"
	"baton/sim/harbor"
	"baton/sim/model"
	"baton/sim/scenarios"
	"baton/sim/upkeep"
)

func main() {
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	err := run(ctx, os.Args[1:], os.Stdout)
	stop()
	if err != nil && !errors.Is(err, flag.ErrHelp) {
		fmt.Fprintln(os.Stderr, "robot:", err)
		os.Exit(1)
	}
}

func run(ctx context.Context, args []string, out io.Writer) error {
	fs := flag.NewFlagSet("robot", flag.ContinueOnError)
	agentd := fs.String("agentd", client.DefaultURL, "this robot's agentd local interface")
	tokenFile := fs.String("token-file", "", "file with the bearer token (agentd's --http-token-file), when agentd needs one")
	scenario := fs.String("scenario", "harbor", "scenario: "+strings.Join(scenarios.Names(), " or ")+" (the fleet's)")
	config := fs.String("config", "", "scenario YAML file (default: the scenario's built-in demo; the fleet's own file)")
	robot := fs.Int("robot", 0, "this robot's id (agentd's --robot)")
	robots := fs.Int("robots", 0, "fleet size (default: the file's or demo's own)")
	rounds := fs.Int("rounds", 0, "rounds to play, then exit (0: until interrupted)")
	start := fs.String("start", "", "where the robot is at start (harbor: x,y; upkeep: a site name or index); default: the scenario's start for this robot")
	if err := fs.Parse(args); err != nil {
		return err
	}
	if fs.NArg() > 0 {
		return fmt.Errorf("unexpected arguments %q", fs.Args())
	}
	if *rounds < 0 {
		return fmt.Errorf("--rounds %d: want 0 (until interrupted) or more", *rounds)
	}
	body, err := newBody(*scenario, *config, *robots, *robot, *start)
	if err != nil {
		return err
	}
	var opts []client.Option
	if *tokenFile != "" {
		tok, err := readToken(*tokenFile)
		if err != nil {
			return err
		}
		opts = append(opts, client.WithToken(tok))
	}
	c, err := client.New(*agentd, opts...)
	if err != nil {
		return err
	}
	fmt.Fprintf(out, "robot %d (%s) at %s; agentd %s\n", *robot, body.what(), body.where(), c.URL())

	// Before its first round a robot says where it is.
	if err := c.Report(ctx, client.Observation{Round: 0, Position: body.position()}); err != nil {
		if errors.Is(err, client.ErrUnauthorized) || ctx.Err() != nil {
			return err
		}
		fmt.Fprintf(out, "start: report not taken: %v\n", err)
	}
	var last uint64
	for played := 0; *rounds == 0 || played < *rounds; played++ {
		d, err := c.Next(ctx, last)
		if err != nil {
			if ctx.Err() != nil {
				fmt.Fprintf(out, "stopped after %d rounds\n", played)
				return nil
			}
			return err // a 401, or an answer that is not agentd's
		}
		last = d.Round
		applied := 0
		if d.Act {
			applied = body.apply(d.Control)
			fmt.Fprintf(out, "round %d: %s (control %d) -> %s\n", d.Round, d.Action, d.Control, body.where())
		} else {
			fmt.Fprintf(out, "round %d: hold (%s) -> stays at %s\n", d.Round, d.Reason, body.where())
		}
		// seen is empty: this robot has no sensors. A real one reports what
		// it saw (harbor: slicks by index; upkeep: its site's wear level).
		err = c.Report(ctx, client.Observation{Round: d.Round, Position: body.position(), Applied: applied})
		switch {
		case err == nil:
		case errors.Is(err, client.ErrUnauthorized):
			return err
		case ctx.Err() != nil:
			fmt.Fprintf(out, "stopped after %d rounds\n", played+1)
			return nil
		default:
			// Refused (a round already over, say) or agentd down: the
			// coordinator keeps its prediction; the next round goes on.
			fmt.Fprintf(out, "round %d: report not taken: %v\n", d.Round, err)
		}
	}
	return nil
}

// body is the robot's own simulated body: where it is, and what a control
// does to it.
type body interface {
	what() string    // the scenario, for the start line
	position() int32 // the position agentd reports
	where() string   // the position for people
	// apply carries out a control and returns what was carried out (0
	// when the control is not one this robot can do here: it stays).
	apply(control int) int
}

func newBody(scenario, file string, robots, robot int, start string) (body, error) {
	m, err := scenarios.Load(scenario, file, robots)
	if err != nil {
		return nil, err
	}
	if robot < 0 || robot >= m.Robots() {
		return nil, fmt.Errorf("--robot %d: the scenario has robots 0..%d (set the fleet size with --robots)", robot, m.Robots()-1)
	}
	fm, ok := m.(model.Fleet)
	if !ok {
		return nil, fmt.Errorf("scenario %s does not run as a fleet", m.Name())
	}
	// The scenario's start for this robot (a dock, a start list, a depot).
	x := m.NewState()
	m.Start(x, model.NewRNG(0).Rand)
	pos := fm.Position(x, robot)
	switch m := m.(type) {
	case *harbor.Model:
		b := &boat{w: m.Width(), h: m.Height()}
		switch {
		case start != "":
			xs, ys, ok := strings.Cut(start, ",")
			cx, errX := strconv.Atoi(strings.TrimSpace(xs))
			cy, errY := strconv.Atoi(strings.TrimSpace(ys))
			if !ok || errX != nil || errY != nil || cx < 0 || cx >= b.w || cy < 0 || cy >= b.h {
				return nil, fmt.Errorf("--start %q: want a cell x,y of the %d x %d grid", start, b.w, b.h)
			}
			b.x, b.y = cx, cy
		case m.Config().Scatter:
			return nil, errors.New("this harbor scatters its boats at random: give --start x,y")
		default:
			b.x, b.y = m.XY(pos)
		}
		return b, nil
	case *upkeep.Model:
		r := &rover{m: m, site: int(pos)}
		if start != "" {
			i, ok := m.SiteIndex(start)
			if n, err := strconv.Atoi(start); err == nil && n >= 0 && n < m.NumSites() {
				i, ok = n, true
			}
			if !ok {
				return nil, fmt.Errorf("--start %q: no such site (a name, or an index 0..%d)", start, m.NumSites()-1)
			}
			r.site = i
		}
		return r, nil
	}
	return nil, fmt.Errorf("scenario %s: this example knows harbor and upkeep only", m.Name())
}

// boat is a harbor skimmer on a W x H grid. Its position is the cell
// y*W + x, y growing northwards. A move off the grid leaves it where it
// is (the control was still carried out, as the scenario has it).
type boat struct{ w, h, x, y int }

func (b *boat) what() string    { return fmt.Sprintf("harbor, %d x %d grid", b.w, b.h) }
func (b *boat) position() int32 { return int32(b.y*b.w + b.x) }
func (b *boat) where() string {
	return fmt.Sprintf("cell %d (x=%d, y=%d)", b.position(), b.x, b.y)
}

func (b *boat) apply(c int) int {
	x, y := b.x, b.y
	switch c {
	case harbor.North:
		y++
	case harbor.South:
		y--
	case harbor.East:
		x++
	case harbor.West:
		x--
	default: // harbor.Hold ("stay"), or no control of this scenario
		return 0
	}
	if x >= 0 && x < b.w && y >= 0 && y < b.h {
		b.x, b.y = x, y
	}
	return c
}

// rover is an upkeep robot on the site graph. Its position is its site's
// index; control 0 services the site it stands on, 1..deg moves to the
// i-th neighbour (neighbours sorted by site index).
type rover struct {
	m    *upkeep.Model
	site int
}

func (r *rover) what() string {
	return fmt.Sprintf("upkeep, %d sites", r.m.NumSites())
}
func (r *rover) position() int32 { return int32(r.site) }
func (r *rover) where() string   { return fmt.Sprintf("site %d (%s)", r.site, r.m.SiteName(r.site)) }

func (r *rover) apply(c int) int {
	nb := r.m.Neighbours(r.site)
	if c < 1 || c > len(nb) {
		return 0 // 0 services the site (a real robot services it here); any other is no move from here
	}
	r.site = nb[c-1]
	return c
}

// readToken reads a token file as agentd does: one word of at least 16
// characters.
func readToken(path string) (string, error) {
	f, err := os.Open(path)
	if err != nil {
		return "", fmt.Errorf("--token-file: %w", err)
	}
	defer f.Close()
	b, err := io.ReadAll(io.LimitReader(f, 4097))
	if err != nil {
		return "", fmt.Errorf("--token-file %s: %w", path, err)
	}
	tok := strings.TrimSpace(string(b))
	if len(b) > 4096 || len(tok) < 16 || strings.ContainsAny(tok, " \t\r\n") {
		return "", fmt.Errorf("--token-file %s: want one token of at least 16 characters, no spaces", path)
	}
	return tok, nil
}
