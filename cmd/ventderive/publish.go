package main

import (
	"context"
	"fmt"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"
)

// asyncPublisher publishes with deterministic message ids and waits for the
// server's acknowledgements a window at a time, so a publish the server
// refused is reported, never dropped. The demo and the bench feed with it.
type asyncPublisher struct {
	js      jetstream.JetStream
	futures []jetstream.PubAckFuture
}

func newAsyncPublisher(js jetstream.JetStream, window int) *asyncPublisher {
	return &asyncPublisher{js: js, futures: make([]jetstream.PubAckFuture, 0, window)}
}

// publish sends one message; when the window is full it first waits for
// the acknowledgements in flight.
func (p *asyncPublisher) publish(ctx context.Context, subject, msgID string, data []byte) error {
	nm := nats.NewMsg(subject)
	nm.Data = data
	f, err := p.js.PublishMsgAsync(nm, jetstream.WithMsgID(msgID))
	if err != nil {
		return fmt.Errorf("publish: %w", err)
	}
	if p.futures = append(p.futures, f); len(p.futures) == cap(p.futures) {
		return p.flush(ctx)
	}
	return nil
}

// flush waits for every acknowledgement in flight.
func (p *asyncPublisher) flush(ctx context.Context) error {
	for _, f := range p.futures {
		select {
		case <-f.Ok():
		case err := <-f.Err():
			return fmt.Errorf("publish: %w", err)
		case <-ctx.Done():
			return ctx.Err()
		}
	}
	p.futures = p.futures[:0]
	return nil
}
