// Package upkeep is the partially observed scenario: robots keep a site graph
// (the service roads of a solar park) in repair while every site wears out
// unseen.
//
// # Model
//
// Each site s has a wear level 0..L that worsens by its own Markov chain P_s
// (a row-stochastic (L+1)x(L+1) matrix; the common case is a birth chain that
// goes up one level with probability p per step and sticks at L). A robot
// sees the exact level of the site it stands on and nothing else, so the
// fleet's state is the robots' positions plus one probability vector over
// levels per site. That belief is exact, not an approximation: sites evolve
// independently and every observation is of one whole site, so the joint
// belief is the product of the per-site beliefs.
//
// # Controls
//
// Robot r at site s has deg(s)+1 controls: 0 services s (the site drops to
// level 0; servicing a level-0 site is a no-op, so 0 doubles as "stay"), and
// 1..deg(s) move to the i-th neighbour of s, neighbours sorted by site index.
//
// # Step
//
// Step(s, u, rng) does, in this order:
//
//  1. every robot with control 0 services its site: the belief becomes a
//     point mass at level 0;
//  2. the stage cost is sum_s sum_l b_s(l)*cost[l], the expected cost after
//     servicing (so a service pays off in the same step);
//  3. wear: b_s <- b_s P_s for every site;
//  4. moving robots move to the chosen neighbour;
//  5. observation: every site with a robot on it (with "observe: all", every
//     site) draws its level from b_s and b_s becomes a point mass there.
//
// For common random numbers Step draws exactly one uniform per site, in site
// order, whether or not the site is observed, so one rng stream gives the
// same site disturbances whatever the controls. Advance is steps 1-4 alone
// and Observe collapses one site: a world simulator that knows the true
// levels calls Advance, then Observe for each site that Observed reports.
//
// The problem is discounted and never terminal; Horizon is the configured
// episode length.
//
// # Base policy
//
// A robot whose site is surely worn (b_s(0) == 0; after an observation this
// means "known to be at level >= 1") services it. Otherwise it targets the
// nearest site, by hop count, whose probability of being at level >= T
// exceeds the threshold probability (ties: higher probability, then lower
// site index) and moves one hop along a shortest path (ties: the
// lowest-index neighbour on a shortest path). With no such site it stays.
// Co-located robots therefore pick the same target; that herding is
// deliberate, it is what rollout is there to fix.
//
// # Terminal cost
//
// TerminalCost is the current expected stage cost held for ever,
// cost(b)/(1-a): crude, cheap, and of the right scale, which is all a
// truncated rollout needs from it.
//
// # Files
//
// An instance is a YAML file (sites/solar-park.yaml is the commented demo,
// embedded as Default): levels (L, 1..8, required), level_cost (L+1 costs,
// required), wear (default up-step probability, 0.05), threshold_level (T,
// default ceil(L/2)), threshold_prob (0.3), discount (0.95, in (0,1)),
// horizon (100), observe (own | all, default own), robots, start (one site
// for every robot, or a list with one site per robot; default the first
// site), sites ({name, x, y} plus optional wear, chain or initial level)
// and roads ([site, site] pairs, two-way; the graph must be connected).
// Without robots the count is 1, or the length of a start list. Every
// problem is reported as "FILE:LINE: FIELD: message". Format writes a model
// back out in this format.
//
// Files are read through sim/config, so a file holds at most
// config.MaxFileBytes, and everything in it that sizes the model is
// bounded: at most 1000 sites, levels at most MaxLevels (so chains of at
// most 9 x 9), at most 256 robots (a start list included), at most one road
// per pair of sites. Parsing n bytes allocates at most AllocPerByte*n +
// AllocFixed bytes (FuzzParse holds Parse to it).
//
// # Exact mode
//
// With "observe: all" every belief is a point mass after each step, so a
// small instance has a finite state space; Key and Outcomes make the model
// model.Enumerable for sim/exact, and RandomTiny makes such instances.
package upkeep
