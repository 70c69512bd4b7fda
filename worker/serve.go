package worker

import (
	"context"
	"fmt"
	"time"

	"github.com/nats-io/nats.go"

	"github.com/plumb-forecast/plumb/stream"
)

// Serve feeds the pool from every input subject on nc until ctx is
// cancelled, then stops the subscription, lets the pool apply what it has
// queued, flushes the outputs and returns. ready, if not nil, is closed once
// the subscription is in place.
func Serve(ctx context.Context, nc *nats.Conn, p *Pool, ready chan<- struct{}) error {
	sub, err := nc.Subscribe(stream.InputsWildcard, func(m *nats.Msg) {
		// Submit only fails once the pool is closed, after the subscription.
		_ = p.Submit(m.Subject, m.Data)
	})
	if err != nil {
		return fmt.Errorf("worker: subscribe %s: %w", stream.InputsWildcard, err)
	}
	// Inputs wait in the client while the shards are busy: allow a large
	// backlog rather than dropping messages as a slow consumer.
	if err := sub.SetPendingLimits(4_000_000, 2<<30); err != nil {
		return fmt.Errorf("worker: pending limits: %w", err)
	}
	if err := nc.Flush(); err != nil {
		return fmt.Errorf("worker: flush: %w", err)
	}
	poolCtx, stopPool := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- p.Run(poolCtx) }()
	if ready != nil {
		close(ready)
	}
	<-ctx.Done()
	// Stop taking messages, wait for the callbacks already delivered.
	if err := sub.Drain(); err == nil {
		deadline := time.Now().Add(30 * time.Second)
		for sub.IsValid() && time.Now().Before(deadline) {
			time.Sleep(10 * time.Millisecond)
		}
	}
	stopPool()
	err = <-done
	if ferr := nc.Flush(); err == nil && ferr != nil && nc.IsConnected() {
		err = fmt.Errorf("worker: flush outputs: %w", ferr)
	}
	return err
}
