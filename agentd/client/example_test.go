package client_test

import (
	"context"
	"errors"
	"log"
	"time"

	"baton/agentd/client"
)

// A robot's loop: wait for the next round's decision, carry it out unless
// it is a hold, report. (Compiled, not run: it needs a running agentd.)
func Example() {
	ctx := context.Background()
	c, err := client.New(client.DefaultURL)
	if err != nil {
		log.Fatal(err)
	}
	position := int32(0) // where the robot is (harbor: its cell)
	if err := c.Report(ctx, client.Observation{Round: 0, Position: position}); err != nil {
		log.Print(err)
	}
	var round uint64
	for {
		d, err := c.Next(ctx, round)
		if errors.Is(err, client.ErrUnauthorized) {
			log.Fatal(err)
		}
		if err != nil {
			log.Print(err)
			time.Sleep(time.Second)
			continue
		}
		round = d.Round
		applied := 0
		if d.Act { // never act on a hold: it has no control
			applied = d.Control
			// ... drive the robot, through its own safety layer ...
		}
		if err := c.Report(ctx, client.Observation{Round: d.Round, Position: position, Applied: applied}); err != nil {
			log.Print(err) // a 400 carries agentd's reason
		}
	}
}

// Watching agentd's health, e.g. to show it on the robot's panel.
func ExampleClient_WatchHealth() {
	ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
	defer cancel()
	c, err := client.New(client.DefaultURL)
	if err != nil {
		log.Fatal(err)
	}
	for h := range c.WatchHealth(ctx, time.Second) {
		if !h.OK {
			log.Printf("robot holds: %s", h.Text)
		}
	}
}
