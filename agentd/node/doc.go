// Package node is the robot daemon's shell: it drives the pure turn
// machine from NATS messages and real time, runs the rollout turn, and
// serves the robot's own software. agentd's main and the simulator's fleet
// command both run it, so the processes a drill starts are the daemon.
package node
