// Package learn is the learned stand-in policy: a small classifier trained
// to imitate one-at-a-time rollout.
//
// It serves twice. A robot whose predecessor's decision did not arrive in
// time asks it what that predecessor most likely chose (a guess that keeps
// most of rollout's coordination, where a base-policy guess makes co-located
// robots herd). And wrapped by AsBase it is the next base policy of
// approximate policy iteration: roll out on top of it, imitate again.
//
// # Pipeline
//
// Collect plays seeded episodes (baton/sim/episode seeds, so a run replays)
// under one-at-a-time rollout and records, for every state and every robot
// k in the order 0..m-1, the features of (state, robot k, position k), the
// control rollout chose and which controls were valid. Split holds out whole
// episodes, so test states come from trajectories the net never saw. Train
// fits a multilayer perceptron (one or two tanh or ReLU hidden layers,
// softmax over the MaxControls control indices with invalid controls masked
// out, cross-entropy plus L2 weight decay, Adam on shuffled minibatches).
// Everything is seeded and single-threaded, so a seed gives the same bytes.
//
// # Guessing in order, and training where the fleet goes
//
// Rollout decides robot k knowing robots 0..k-1's choices, so the features
// see them too (Featurizer.Features takes prior[j], -1 where not known):
// the other robots' positions are taken after their known controls. In
// Collect they are the rollout's own choices; when guessing (signal's
// learned source, through PredictGiven) they are what was heard, or guessed
// just before for the robots earlier in the order, so robots at one dock
// are told apart the way rollout tells them apart.
//
// A parallel fleet guessing with the net drifts to states one-at-a-time
// rollout never visits, where errors compound. CollectOnPolicy is one round
// of on-policy data aggregation (DAgger: Ross, Gordon & Bagnell, AISTATS
// 2011): it plays the fleet in parallel mode with the current net's
// guesses, labels every state it visits with one-at-a-time rollout's
// controls, and the data is appended (Dataset.Append) before training
// again. On the herding case (4 boats from one dock, 200 paired episodes)
// the share of sequential rollout's advantage over parallel base guesses
// that parallel learned guesses keep went 0.65 (state-only features) ->
// 0.71 (in order) -> 0.77, 0.82, 0.85 (1, 2, 3 rounds of aggregation) ->
// 0.86 (3 rounds, 64 hidden units).
//
// # Features
//
// Besides the known predecessors' controls, features see only the decision
// state, the robot and its position in the turn order. The position
// matters because robots in one state are often indistinguishable (boats
// at one dock) when nothing is known of the others: rollout sends the
// first one to one target and the second elsewhere. Inputs
// are standardised with the training set's mean and spread (stored in the
// model), so the raw scales below only need to be sensible, not unit.
//
// harbor (version "harbor.2", 35 + 6*4 = 59 inputs):
//
//   - own cell x/(W-1), y/(H-1): where the edges are, which bound moves;
//   - other boats on the same cell, /m: the herding situation (other boats
//     always where their known controls take them);
//   - per move N, S, E, W: predecessors whose known control takes them to
//     that cell, /m; and the share of predecessors whose control is known;
//   - k/m and a one-hot of k in {0, 1, 2, >=3}: the turn position;
//   - slicks left / total: late in an episode boats spread differently;
//   - one-hot of the heuristic base control (nearest slick, east-west
//     first): rollout keeps it most of the time, so it is a strong prior;
//   - per move N, S, E, W: whether the grid edge blocks it, the share of
//     the 4 nearest slicks it brings one step closer, and how much it
//     raises the pull sum_slicks 0.8^distance over holding, once over all
//     slicks and once over those no other boat is strictly nearer to (the
//     ones left for this boat): lines each output up with its own evidence,
//     and the second pull is what sends a boat past a slick others will
//     take;
//   - for each of the 4 nearest uncollected slicks (by distance, ties to the
//     lower cell, as the base policy ranks them): a present flag, the
//     offset dx/W and dy/H, the distance /(W+H), and how many other boats
//     are strictly nearer to it and exactly as near, /m: whether the slick
//     is the robot's to take or someone else's.
//
// upkeep (version "upkeep.2", 13 + 9*(MaxControls-1) inputs; 58 for the
// solar park):
//
//   - k/m and a one-hot of k in {0, 1, 2, >=3}, other robots at the same
//     site /m, and the fleet's total expected stage cost (normalised by
//     sites x the highest level cost): the turn position, herding and how
//     worn the park is overall;
//   - own site (control 0, service): expected cost /max cost, P(level>=1),
//     P(level>=T), whether the level is known (point-mass belief), the
//     known or expected level /L, and whether base services: what servicing
//     now would buy;
//   - per move control c (its neighbour v; zeros when the site has fewer
//     roads, with a valid flag of 0, so every output has its own slots):
//     valid, v's expected cost and P(level>=T), the sums of expected cost
//     over the sites t for which v is on a shortest path, discounted by
//     0.5^(d-1) and 0.85^(d-1) (d = hops from the robot's site: near and far
//     risk in that direction), the near sum again over only the sites no
//     other robot is strictly nearer to (risk left for this robot), the
//     maximum of P(level>=T)*0.7^(d-1) over those sites (what the base
//     policy chases), other robots standing on v /m, and whether base takes
//     this move.
//
// T is the base policy's threshold level. The scenario does not export it,
// so FeaturizerFor reads it off the base policy by probing a synthetic state
// (one neighbour at level l, everything else fine: base heads there once
// l >= T).
//
// # Model files
//
// A model is a baton.v1.GuessModel (proto/model.proto) framed as
//
//	"BATONGM2" | uint32 big-endian length | GuessModel bytes | SHA-256 of those bytes
//
// Load and Check refuse truncated files, bad magic, checksum mismatches,
// models for another scenario or feature version, and layer shapes that do
// not fit the fleet's features, each with its own error (ErrTruncated,
// ErrMagic, ErrChecksum, ErrScenario, ErrFeatureVersion, ErrShape; ErrFormat
// for undecodable contents), so a robot keeps its previous model rather
// than guessing with the wrong one. A file holds at most MaxFileBytes (64
// MB of contents; Load checks the size before reading) and at most three
// layers, and decoding n bytes allocates at most AllocPerByte*n +
// AllocFixed bytes (FuzzUnmarshal and FuzzUnmarshalBody hold Unmarshal and
// Check to it).
package learn
