package main

import (
	"context"
	"fmt"
	"log/slog"
	"strings"
	"time"

	"github.com/jackc/pgx/v5/pgxpool"

	"github.com/ventderive/ventderive/consumer"
	"github.com/ventderive/ventderive/consumer/postgres"
)

// bufferCheckInterval is how often serve reads shared_buffers and the sizes
// of the random-order indexes (postgres.RandomIndexes) after the check at
// start. The indexes grow with the store, by a few hundred bytes an input
// (README, Operations, "Sizing PostgreSQL memory"): an hour is far shorter
// than the weeks they take to outgrow a sized shared_buffers, and the check
// costs a few catalog reads.
const bufferCheckInterval = time.Hour

// randomIndexShare is the share of shared_buffers the random-order indexes
// may take before serve warns. Their working set is their whole size, but
// they are not all that an input touches: the heap pages of inbox and
// fact_row being filled, the right edges of the time-ordered indexes, the
// patient's recent facts that the lookups read and the derived values'
// tables need buffers too, and PostgreSQL's clock sweep evicts by use, not
// by table. Half leaves as much again for all of these. Measured (README):
// 128 MB shared_buffers with the indexes at about twice that already
// raised the per-input cost by a third; 10 GB with them at about a tenth of it
// kept the cost flat.
const randomIndexShare = 0.5

// buffersFix is the remedy the warning names.
const buffersFix = "raise shared_buffers (postgresql.conf; needs a restart) to at least twice the indexes' size, " +
	"and RAM to hold it: README, Operations, \"Sizing PostgreSQL memory\""

// overBuffers reports whether the indexes of r take more than share of
// shared_buffers.
func overBuffers(r postgres.BufferReport, share float64) bool {
	return float64(r.IndexBytes()) > share*float64(r.SharedBuffers)
}

// checkBuffers reads shared_buffers and the random-order indexes' sizes,
// sets the gauges, and warns, naming each index with its size, when they
// take more than share of shared_buffers; otherwise it logs the sizes at
// level. It returns whether it warned.
func checkBuffers(ctx context.Context, pool *pgxpool.Pool, log *slog.Logger, m *consumer.Metrics, now time.Time, share float64, level slog.Level) (bool, error) {
	r, err := postgres.ReadBuffers(ctx, pool, now)
	if err != nil {
		return false, err
	}
	byIndex := map[string]float64{}
	for _, ix := range postgres.RandomIndexes {
		byIndex[ix.Name] = 0
	}
	var each []string
	for _, ix := range r.Indexes {
		byIndex[ix.Index] += float64(ix.Bytes)
		each = append(each, fmt.Sprintf("%s (%s) %s", ix.Relation, ix.Table, sizeText(ix.Bytes)))
	}
	if m != nil {
		for name, b := range byIndex {
			m.RandomIndexBytes.WithLabelValues(name).Set(b)
		}
		m.SharedBuffersBytes.Set(float64(r.SharedBuffers))
	}
	if !overBuffers(r, share) {
		log.Log(ctx, level, "database buffers checked", "index_bytes", r.IndexBytes(), "index_size", sizeText(r.IndexBytes()),
			"shared_buffers_bytes", r.SharedBuffers, "shared_buffers", sizeText(r.SharedBuffers))
		return false, nil
	}
	log.Warn("random-order indexes exceed their share of shared_buffers",
		"indexes", strings.Join(each, ", "),
		"index_bytes", r.IndexBytes(), "index_size", sizeText(r.IndexBytes()),
		"shared_buffers_bytes", r.SharedBuffers, "shared_buffers", sizeText(r.SharedBuffers),
		"want_at_most", fmt.Sprintf("%g of shared_buffers", share),
		"why", "every input inserts into these indexes at a random page: above shared_buffers, nearly every insert reads a page back, and the cost per input grows with the store",
		"fix", buffersFix)
	return true, nil
}

// watchBuffers runs checkBuffers at once and then every interval until ctx
// ends; the sizes of the first check that succeeds are logged at info, the
// later ones at debug. A failed check is logged and tried again at the next
// interval: it never stops the service nor makes it unready.
func watchBuffers(ctx context.Context, pool *pgxpool.Pool, log *slog.Logger, m *consumer.Metrics, interval time.Duration, share float64) {
	t := time.NewTicker(interval)
	defer t.Stop()
	level := slog.LevelInfo
	for {
		cctx, cancel := context.WithTimeout(ctx, 30*time.Second)
		_, err := checkBuffers(cctx, pool, log, m, time.Now(), share, level)
		cancel()
		switch {
		case err == nil:
			level = slog.LevelDebug
		case ctx.Err() == nil:
			log.Warn("database buffer check failed; trying again at the next interval", "err", err, "interval", interval.String())
		}
		select {
		case <-ctx.Done():
			return
		case <-t.C:
		}
	}
}

// sizeText is n in the units pg_size_pretty uses (1024-based), one decimal.
func sizeText(n int64) string {
	units := []string{"bytes", "kB", "MB", "GB", "TB"}
	v, i := float64(n), 0
	for v >= 1024 && i < len(units)-1 {
		v /= 1024
		i++
	}
	if i == 0 {
		return fmt.Sprintf("%d bytes", n)
	}
	return fmt.Sprintf("%.1f %s", v, units[i])
}
