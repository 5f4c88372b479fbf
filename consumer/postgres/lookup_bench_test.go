package postgres_test

import (
	"fmt"
	"os"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/jackc/pgx/v5/pgxpool"

	"github.com/ventderive/ventderive/consumer"
	"github.com/ventderive/ventderive/consumer/postgres"
	"github.com/ventderive/ventderive/fhirmap"
)

// backendCPU is the user + system CPU time of a local PostgreSQL backend
// (/proc/<pid>/stat fields 14 and 15, in clock ticks of 10 ms: the usual
// USER_HZ of Linux).
func backendCPU(b *testing.B, pid int) time.Duration {
	b.Helper()
	raw, err := os.ReadFile(fmt.Sprintf("/proc/%d/stat", pid))
	if err != nil {
		b.Skipf("backend CPU not readable (PostgreSQL not on this machine?): %v", err)
	}
	// Fields after the command name, which is in parentheses.
	fields := strings.Fields(string(raw[strings.LastIndexByte(string(raw), ')')+2:]))
	utime, err1 := strconv.ParseInt(fields[11], 10, 64)
	stime, err2 := strconv.ParseInt(fields[12], 10, 64)
	if err1 != nil || err2 != nil {
		b.Fatalf("parse /proc/%d/stat: %v %v", pid, err1, err2)
	}
	return time.Duration(utime+stime) * 10 * time.Millisecond
}

// BenchmarkFactInsertCPU stores messages of four ventilator readings each
// (no blood gas: the insert is most of the work) through one connection,
// with and without the Store's cache of term and encounter ids, one by one
// (Ingest) and in groups of 64 (IngestBatch, the cold path's one insert),
// and reports the CPU time of that connection's PostgreSQL backend per
// message: other work on the machine does not count, unlike a whole-server
// figure. Compare the cases of one run.
func BenchmarkFactInsertCPU(b *testing.B) {
	for _, group := range []int{1, 64} {
		for _, cache := range []bool{false, true} {
			b.Run(fmt.Sprintf("group=%d/cache=%v", group, cache), func(b *testing.B) {
				f := newFixture(b)
				cfg, err := pgxpool.ParseConfig(f.url)
				if err != nil {
					b.Fatal(err)
				}
				cfg.MaxConns, cfg.MinConns = 1, 1
				pool, err := pgxpool.NewWithConfig(f.ctx, cfg)
				if err != nil {
					b.Fatal(err)
				}
				defer pool.Close()
				store := postgres.New(pool, postgres.Options{PatientKey: testKey, Now: clock()})
				if !cache {
					store.WithoutLookupCache()
				}
				var pid int
				if err := pool.QueryRow(f.ctx, `SELECT pg_backend_pid()`).Scan(&pid); err != nil {
					b.Fatal(err)
				}
				var p testPlan
				const patients = 16
				n := 0
				batch := func() []consumer.Message {
					msgs := make([]consumer.Message, group)
					for j := range msgs {
						i := n*group + j
						pat := fmt.Sprintf("Patient/lg-cpu-%02d", i%patients)
						at := t0.Add(time.Duration(i/patients) * time.Minute)
						id := fmt.Sprintf("r-%d", i)
						msgs[j] = message("fhir.input.device", uint64(i+1),
							vent(pat, id+"-ve", fhirmap.QMinuteVol, at, 9, "L/min"),
							vent(pat, id+"-vt", fhirmap.QTidalVol, at, 450, "mL"),
							vent(pat, id+"-rr", fhirmap.QRespRate, at, 18, "/min"),
							vent(pat, id+"-et", fhirmap.QPETCO2, at, 35, "mm[Hg]"))
						for k := range msgs[j].Facts {
							msgs[j].Facts[k].Encounter = fmt.Sprintf("Encounter/lg-cpu-%02d", i%patients)
						}
					}
					n++
					return msgs
				}
				ingest := func(msgs []consumer.Message) {
					if len(msgs) == 1 {
						if _, err := store.Ingest(f.ctx, msgs[0], p.plan); err != nil {
							b.Fatal(err)
						}
						return
					}
					for _, r := range store.IngestBatch(f.ctx, msgs, p.plan) {
						if r.Err != nil {
							b.Fatal(r.Err)
						}
					}
				}
				// Warm up: the terms and encounters exist (and are cached).
				for range 4 {
					ingest(batch())
				}
				n0 := n
				cpu0 := backendCPU(b, pid)
				for b.Loop() {
					ingest(batch())
				}
				msgs := (n - n0) * group
				b.ReportMetric(float64((backendCPU(b, pid)-cpu0).Microseconds())/float64(msgs), "pg-us/msg")
				if nt, _ := store.CachedLookups(); cache != (nt > 0) {
					b.Errorf("cache %v: %d terms cached", cache, nt)
				}
			})
		}
	}
}
