package main

import (
	"context"
	"fmt"
	"log/slog"
	"strings"
	"testing"
	"time"

	"github.com/jackc/pgx/v5/pgxpool"
	"github.com/prometheus/client_golang/prometheus"
	dto "github.com/prometheus/client_model/go"

	"github.com/ventderive/ventderive/consumer"
	"github.com/ventderive/ventderive/consumer/postgres"
	"github.com/ventderive/ventderive/consumer/postgres/pgtest"
	"github.com/ventderive/ventderive/migrations"
)

// The decision: warn when the indexes take more than the share of
// shared_buffers, not at it.
func TestOverBuffers(t *testing.T) {
	const mb = 1 << 20
	report := func(sb int64, sizes ...int64) postgres.BufferReport {
		r := postgres.BufferReport{SharedBuffers: sb}
		for _, s := range sizes {
			r.Indexes = append(r.Indexes, postgres.IndexSize{Bytes: s})
		}
		return r
	}
	for _, c := range []struct {
		name string
		r    postgres.BufferReport
		want bool
	}{
		{"the measured 4-day store on 128 MB", report(128*mb, 898*mb, 261*mb, 14*mb), true},
		{"the same store on 10 GB", report(10240*mb, 898*mb, 261*mb, 14*mb), false},
		{"exactly half", report(128*mb, 40*mb, 24*mb), false},
		{"a byte over half", report(128*mb, 40*mb, 24*mb+1), true},
		{"no index bytes", report(128 * mb), false},
		{"no shared_buffers read", report(0, 8192), true},
	} {
		if got := overBuffers(c.r, randomIndexShare); got != c.want {
			t.Errorf("%s: over = %v, want %v", c.name, got, c.want)
		}
	}
}

// TestCheckBuffersWarnsAndSetsGauges: on a migrated database with the
// partitions serve makes, the gauges are the sizes PostgreSQL reports
// (computed here by partition name, not by the check's bound parsing) and
// pg_size_bytes(current_setting('shared_buffers')); with the service's
// share nothing is said about a new store, and with a tiny share the
// warning names every index with its size, shared_buffers and the fix.
func TestCheckBuffersWarnsAndSetsGauges(t *testing.T) {
	t.Parallel()
	ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
	defer cancel()
	pool, err := pgxpool.New(ctx, pgtest.NewDatabase(t))
	if err != nil {
		t.Fatal(err)
	}
	defer pool.Close()
	now := time.Now().UTC()
	if err := postgres.EnsurePartitions(ctx, pool, now); err != nil {
		t.Fatal(err)
	}
	// Some invented inbox keys, so that the indexes' sizes differ.
	// (Migration 0019: the key is its 32 bytes, the subject an id into
	// inbox_subject.)
	if _, err := pool.Exec(ctx, `INSERT INTO inbox_subject (subject) VALUES ('fhir.input.test') ON CONFLICT DO NOTHING`); err != nil {
		t.Fatal(err)
	}
	if _, err := pool.Exec(ctx, `INSERT INTO inbox (inbox_key, subject_id, stream_seq, received, recorded_at, resources, facts)
		SELECT sha256(i::text::bytea), (SELECT id FROM inbox_subject WHERE subject = 'fhir.input.test'), i, now(), now(), 0, 0
		FROM generate_series(1, 3000) i`); err != nil {
		t.Fatal(err)
	}
	size := func(sql string, args ...any) float64 {
		t.Helper()
		var n int64
		if err := pool.QueryRow(ctx, sql, args...).Scan(&n); err != nil {
			t.Fatal(err)
		}
		return float64(n)
	}
	month := func(m time.Time) string { return "fact_row_" + m.Format("2006_01") }
	first := time.Date(now.Year(), now.Month(), 1, 0, 0, 0, 0, time.UTC)
	wantFact := size(`SELECT sum(pg_relation_size(i.indexrelid))::bigint FROM pg_index i
		JOIN pg_inherits h ON h.inhrelid = i.indexrelid AND h.inhparent = 'fact_row_key_hash_digest_effective'::regclass
		WHERE i.indrelid IN (to_regclass($1), to_regclass($2), 'fact_row_default'::regclass)`, month(first), month(first.AddDate(0, 1, 0)))
	want := map[string]float64{
		"inbox_pkey":                         size(`SELECT pg_relation_size('inbox_pkey')`),
		"outbox_msg_id_key":                  size(`SELECT pg_relation_size('outbox_msg_id_key')`),
		"fact_row_key_hash_digest_effective": wantFact,
	}
	wantSB := size(`SELECT pg_size_bytes(current_setting('shared_buffers'))`)
	if wantFact != 3*8192 || want["inbox_pkey"] <= want["outbox_msg_id_key"] {
		t.Fatalf("control: the sizes are %v; want three empty fact indexes and a larger inbox_pkey", want)
	}

	m := consumer.NewMetrics(prometheus.NewRegistry())
	var out lockedBuilder
	log := slog.New(slog.NewJSONHandler(&out, nil))
	warned, err := checkBuffers(ctx, pool, log, m, now, randomIndexShare, slog.LevelInfo)
	if err != nil {
		t.Fatal(err)
	}
	if warned || strings.Contains(out.String(), "exceed") || !strings.Contains(out.String(), `"msg":"database buffers checked"`) {
		t.Errorf("a new store warned, or its sizes were not logged:\n%s", out.String())
	}
	for name, w := range want {
		if got := gaugeValue(t, m.RandomIndexBytes.WithLabelValues(name)); got != w {
			t.Errorf("ventderive_random_index_bytes{index=%q} = %v, want %v", name, got, w)
		}
	}
	if got := gaugeValue(t, m.SharedBuffersBytes); got != wantSB {
		t.Errorf("ventderive_shared_buffers_bytes = %v, want %v", got, wantSB)
	}

	warned, err = checkBuffers(ctx, pool, log, m, now, 1e-9, slog.LevelInfo)
	if err != nil {
		t.Fatal(err)
	}
	logged := out.String()
	if !warned {
		t.Errorf("a tiny share did not warn:\n%s", logged)
	}
	for _, s := range []string{`"msg":"random-order indexes exceed their share of shared_buffers"`,
		"inbox_pkey (inbox) ", "outbox_msg_id_key (outbox) 8.0 kB", "(fact_row_default) 8.0 kB",
		"(" + month(first) + ") 8.0 kB", "(" + month(first.AddDate(0, 1, 0)) + ") 8.0 kB",
		`"shared_buffers":"` + sizeText(int64(wantSB)) + `"`, `"fix":"raise shared_buffers`, "Sizing PostgreSQL memory"} {
		if !strings.Contains(logged, s) {
			t.Errorf("warning lacks %s:\n%s", s, logged)
		}
	}
	if strings.Contains(logged, month(first.AddDate(0, -1, 0))) || strings.Contains(logged, month(first.AddDate(0, 2, 0))) {
		t.Errorf("warning names a partition that receives no inserts now:\n%s", logged)
	}
}

// TestWatchBuffersRetriesAfterFailure: a check that fails (a database not
// migrated yet: no such indexes) is logged and tried again at the next
// interval; once the schema is there the gauges are set; the loop ends
// with its context.
func TestWatchBuffersRetriesAfterFailure(t *testing.T) {
	t.Parallel()
	ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
	defer cancel()
	u := pgtest.NewEmptyDatabase(t)
	pool, err := pgxpool.New(ctx, u)
	if err != nil {
		t.Fatal(err)
	}
	defer pool.Close()
	m := consumer.NewMetrics(prometheus.NewRegistry())
	var out lockedBuilder
	log := slog.New(slog.NewJSONHandler(&out, nil))
	wctx, stop := context.WithCancel(ctx)
	done := make(chan struct{})
	go func() { defer close(done); watchBuffers(wctx, pool, log, m, 20*time.Millisecond, randomIndexShare) }()
	waitFor := func(what string, ok func() bool) {
		t.Helper()
		for deadline := time.Now().Add(20 * time.Second); !ok(); time.Sleep(10 * time.Millisecond) {
			if time.Now().After(deadline) {
				t.Fatalf("no %s:\n%s", what, out.String())
			}
		}
	}
	waitFor("failure logged twice", func() bool {
		return strings.Count(out.String(), `"msg":"database buffer check failed; trying again at the next interval"`) >= 2
	})
	if !strings.Contains(out.String(), "inbox_pkey") {
		t.Errorf("the failure does not name the missing index:\n%s", out.String())
	}
	if got := gaugeValue(t, m.SharedBuffersBytes); got != 0 {
		t.Errorf("gauge set by a failed check: %v", got)
	}
	if _, err := migrations.Apply(ctx, pool, nil); err != nil {
		t.Fatal(err)
	}
	waitFor("gauge set after the schema appeared", func() bool { return gaugeValue(t, m.SharedBuffersBytes) > 0 })
	stop()
	select {
	case <-done:
	case <-time.After(5 * time.Second):
		t.Fatal("watchBuffers did not end with its context")
	}
}

// gaugeValue is the value of a gauge.
func gaugeValue(t *testing.T, g prometheus.Gauge) float64 {
	t.Helper()
	var d dto.Metric
	if err := g.Write(&d); err != nil {
		t.Fatal(err)
	}
	return d.GetGauge().GetValue()
}

// serve runs the check at start, before NATS is reached (here it never
// is): the sizes are in its log while it retries the connection.
func TestServeChecksBuffersAtStart(t *testing.T) {
	t.Parallel()
	db := pgtest.NewDatabase(t)
	var out lockedBuilder
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() {
		done <- run(ctx, []string{"serve", "--database-url", db, "--http-addr", "",
			"--nats-url", fmt.Sprintf("nats://127.0.0.1:%d", closedPort(t))}, serveEnvW(&out))
	}()
	deadline := time.Now().Add(30 * time.Second)
	for !strings.Contains(out.String(), `"msg":"database buffers checked"`) || !strings.Contains(out.String(), `"msg":"nats unreachable; retrying"`) {
		if time.Now().After(deadline) {
			cancel()
			t.Fatalf("no buffer check logged at start:\n%s", out.String())
		}
		time.Sleep(20 * time.Millisecond)
	}
	cancel()
	select {
	case <-done:
	case <-time.After(20 * time.Second):
		t.Fatal("serve did not stop")
	}
	for _, s := range []string{`"shared_buffers":"`, `"index_size":"`} {
		if !strings.Contains(out.String(), s) {
			t.Errorf("log lacks %s:\n%s", s, out.String())
		}
	}
}
