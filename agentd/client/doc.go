// Package client is a Go client for agentd's local interface: the HTTP
// interface a robot's own software uses to read its decision for each
// round and to report what it did and saw (README, "The robot's local
// interface").
//
// A robot's loop reads the next round's decision, carries it out when it
// says to act, and reports:
//
//	c, err := client.New("http://127.0.0.1:7400", client.WithToken(token))
//	if err != nil {
//		return err
//	}
//	var round uint64
//	for ctx.Err() == nil {
//		d, err := c.Next(ctx, round)
//		if err != nil {
//			return err // ctx ended, or agentd refused the token
//		}
//		round = d.Round
//		applied := 0 // a hold: do nothing new (control 0)
//		if d.Act {
//			applied = carryOut(d.Control) // the robot's safety layer may refuse
//		}
//		obs := client.Observation{Round: d.Round, Position: where(), Applied: applied, Seen: sightings()}
//		if err := c.Report(ctx, obs); err != nil {
//			log.Print(err) // e.g. a 400 with agentd's reason; the next round goes on
//		}
//	}
//
// Before its first round a robot reports where it is, as round 0.
//
// # Holds
//
// A Decision with Act false is a hold: there is no valid decision for the
// round, so the robot does nothing new, and it never carries a control or
// an action (Control is 0, Action empty; Reason says why). The zero
// Decision is a hold too, so software that acts only on Act acts on
// nothing when a call fails.
//
// # Waiting
//
// Decision, Closed and Next long-poll agentd (GET /v1/decision with
// wait=, at most WithWait per request) and ask again until an answer comes
// that waiting cannot change: a decision, or a hold agentd gives at once
// (the round is over, closed without this robot's decision, the robot is
// not in its order, round starts are refused, NATS is lost). A hold that
// comes back only when the wait ran out (the round has not started or not
// been decided yet) is asked again. While agentd is unreachable or answers
// 5xx they retry with backoff (WithRetry). They wait until ctx ends, so
// give them a context with a deadline; a wait cut short by ctx returns the
// last hold agentd gave (Act false) with the context's error.
//
// Report retries transient failures (agentd down or restarting, 5xx) up to
// RetryPolicy.Attempts times; a 400 is not retried and its error carries
// agentd's message. A 401 (missing or wrong token) is never retried. Every
// answer is read up to a size limit, and every request is bounded: a long
// poll by its wait plus WithTimeout, anything else by WithTimeout.
package client
