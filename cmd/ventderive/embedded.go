package main

import (
	"context"
	"crypto/rand"
	"crypto/sha256"
	"encoding/hex"
	"errors"
	"fmt"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgxpool"
	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go/jetstream"

	"github.com/ventderive/ventderive/consumer"
	"github.com/ventderive/ventderive/consumer/postgres/pgtest"
)

// Helpers shared by the demo and the bench, which both run the service on
// an embedded NATS server and a database of their own.

// startEmbeddedNATS starts a nats-server with JetStream on a free loopback
// port, storing in storeDir. The caller shuts it down.
func startEmbeddedNATS(storeDir string) (*server.Server, error) {
	ns, err := server.NewServer(&server.Options{
		Host: "127.0.0.1", Port: -1, JetStream: true, StoreDir: storeDir,
		NoLog: true, NoSigs: true,
	})
	if err != nil {
		return nil, fmt.Errorf("embedded nats: %w", err)
	}
	ns.Start()
	if !ns.ReadyForConnections(10 * time.Second) {
		ns.Shutdown()
		return nil, errors.New("embedded nats did not start")
	}
	return ns, nil
}

// createDatabase creates an empty database named prefix plus a random
// suffix on the server admin names, and returns its name and URL.
func createDatabase(ctx context.Context, admin, prefix string) (name, url string, err error) {
	var rnd [4]byte
	_, _ = rand.Read(rnd[:])
	name = prefix + hex.EncodeToString(rnd[:])
	c, err := pgx.Connect(ctx, admin)
	if err != nil {
		return "", "", fmt.Errorf("database: %w", err)
	}
	defer c.Close(ctx)
	if _, err := c.Exec(ctx, "CREATE DATABASE "+pgx.Identifier{name}.Sanitize()); err != nil {
		return "", "", fmt.Errorf("create database: %w", err)
	}
	if url, err = pgtest.WithDatabase(admin, name); err != nil {
		return "", "", err
	}
	return name, url, nil
}

// dropDatabase removes a database createDatabase made (best effort).
func dropDatabase(admin, name string) {
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	if c, err := pgx.Connect(ctx, admin); err == nil {
		_, _ = c.Exec(ctx, "DROP DATABASE IF EXISTS "+pgx.Identifier{name}.Sanitize()+" WITH (FORCE)")
		c.Close(ctx)
	}
}

// waitSettled waits until durable has nothing pending or in flight and,
// when pool is not nil, the outbox is empty and at least want distinct
// inputs are recorded (inbox or dead letter): the consumer's counters alone
// can read zero for a moment after a publish, before the server counts the
// message for the consumer.
func waitSettled(ctx context.Context, js jetstream.JetStream, durable string, pool *pgxpool.Pool, want int64, timeout, poll time.Duration) error {
	deadline := time.Now().Add(timeout)
	for {
		var pending, ackPending uint64 = 1, 1
		if c, err := js.Consumer(ctx, consumer.DefaultInputStream, durable); err == nil {
			if ci, err := c.Info(ctx); err == nil {
				pending, ackPending = ci.NumPending, uint64(ci.NumAckPending)
			}
		}
		var backlog, recorded int64 = 0, want
		if pool != nil && pending == 0 && ackPending == 0 {
			if err := pool.QueryRow(ctx, `SELECT (SELECT count(*) FROM outbox WHERE published_at IS NULL),
				(SELECT count(*) FROM inbox) + (SELECT count(*) FROM dead_letter)`).Scan(&backlog, &recorded); err != nil {
				backlog = 1
			}
		}
		if pending == 0 && ackPending == 0 && backlog == 0 && recorded >= want {
			return nil
		}
		if time.Now().After(deadline) {
			return fmt.Errorf("not settled after %s: %d pending, %d in flight, %d unpublished, %d of %d inputs recorded",
				timeout, pending, ackPending, backlog, recorded, want)
		}
		select {
		case <-ctx.Done():
			return ctx.Err()
		case <-time.After(poll):
		}
	}
}

// distinctPayloads counts the different payloads among n messages: the
// inbox rows plus dead letters a settled run holds.
func distinctPayloads(n int, payload func(i int) []byte) int64 {
	seen := make(map[[32]byte]bool, n)
	for i := range n {
		seen[sha256.Sum256(payload(i))] = true
	}
	return int64(len(seen))
}
