package postgres_test

import (
	"bytes"
	"fmt"
	"os"
	"strconv"
	"strings"
	"sync/atomic"
	"syscall"
	"testing"
	"time"

	"github.com/google/uuid"
	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgxpool"

	"github.com/ventderive/ventderive/consumer"
	"github.com/ventderive/ventderive/consumer/postgres"
	"github.com/ventderive/ventderive/fhirmap"
	"github.com/ventderive/ventderive/physio"
)

// benchMessage is one blood-gas panel (one resource, three facts) of
// patient i%patients, an hour after the patient's previous one.
func benchMessage(i, patients int) consumer.Message {
	patient := fmt.Sprintf("Patient/lg-bench-%03d", i%patients)
	at := t0.Add(time.Duration(i/patients) * time.Hour)
	id := fmt.Sprintf("abg-%d", i)
	pco2 := abg(patient, id, at, 45)
	msg := message("fhir.input.lab", uint64(i+1), pco2)
	f := msg.Facts[0]
	po2, ph := f, f
	po2.Key, po2.Quantity, po2.Value, po2.Specimen = f.Key+"#po2", fhirmap.QPO2, 80, fhirmap.SpecimenArterial
	ph.Key, ph.Quantity, ph.Value, ph.Unit, ph.Specimen = f.Key+"#ph", fhirmap.QPH, 7.35, "[pH]", fhirmap.SpecimenArterial
	msg.Facts = append(msg.Facts, po2, ph)
	return msg
}

// benchPlan derives three values for each affected blood gas, each with
// the three facts of the panel as lineage, and one outbox row each.
func benchPlan(s consumer.Snapshot) (consumer.Changes, error) {
	var ch consumer.Changes
	res, err := physio.DeadSpaceFromVCO2(45, 200, 10, 37)
	if err != nil {
		return ch, err
	}
	for _, key := range s.Affected {
		var inputs []fhirmap.Input
		for _, f := range s.Facts {
			if f.Resource == key {
				inputs = append(inputs, fhirmap.Input{Role: fhirmap.Role(f.Quantity), Fact: f})
			}
		}
		for _, kind := range []string{kindVDVT, "deadspace-fraction-enghoff", "alveolar-deadspace-fraction"} {
			dkey := s.Patient + "|" + key + "|" + kind
			d := fhirmap.Derivation{Key: dkey, ID: uuid.NewSHA1(uuid.NameSpaceURL, []byte(dkey)).String(), Kind: kind,
				Patient: s.Patient, Effective: inputs[0].Fact.Effective, BloodGas: key, Result: res, Inputs: inputs,
				Status: fhirmap.StatusFinal, Algorithm: "bench/1", Digest: sha([]byte(dkey))}
			ch.Derivations = append(ch.Derivations, d)
			ch.Versions = append(ch.Versions, 1)
			ch.Outbox = append(ch.Outbox, consumer.OutboxMessage{Subject: consumer.DefaultObservationSub, MsgID: d.Digest,
				Header: map[string]string{consumer.HeaderKind: kind}, Payload: make([]byte, 1200)})
		}
	}
	return ch, nil
}

// BenchmarkIngest writes one input message (a blood-gas panel) with three
// derivations, their lineage, head rows and outbox rows, in one transaction,
// with synchronous_commit on, from 1, 4 and 16 connections. It reports
// derivations per second. The last case turns synchronous_commit off for
// the session only, to show what the WAL flush at COMMIT costs; it is a
// measurement aid, not a setting the service uses.
func BenchmarkIngest(b *testing.B) {
	cases := []struct {
		name     string
		workers  int
		asyncWAL bool
	}{
		{"connections=1", 1, false},
		{"connections=4", 4, false},
		{"connections=16", 16, false},
		{"connections=1/synchronous_commit=off", 1, true},
	}
	for _, c := range cases {
		b.Run(c.name, func(b *testing.B) {
			f := newFixture(b)
			cfg, err := pgxpool.ParseConfig(f.url)
			if err != nil {
				b.Fatal(err)
			}
			cfg.MaxConns = int32(c.workers)
			want := "on"
			if c.asyncWAL {
				want = "off"
				cfg.ConnConfig.RuntimeParams["synchronous_commit"] = "off"
			}
			pool, err := pgxpool.NewWithConfig(f.ctx, cfg)
			if err != nil {
				b.Fatal(err)
			}
			defer pool.Close()
			var sc string
			if err := pool.QueryRow(f.ctx, "SHOW synchronous_commit").Scan(&sc); err != nil || sc != want {
				b.Fatalf("synchronous_commit = %q, %v; want %s", sc, err, want)
			}
			store := postgres.New(pool, postgres.Options{PatientKey: testKey})
			var next, derived atomic.Int64
			run := func() {
				i := int(next.Add(1))
				res, err := store.Ingest(f.ctx, benchMessage(i, 50), benchPlan)
				if err != nil {
					b.Error(err)
					return
				}
				derived.Add(int64(res.Derivations))
			}
			start := time.Now()
			if c.workers == 1 {
				for b.Loop() {
					run()
				}
			} else {
				b.SetParallelism((c.workers + 1) / 2) // GOMAXPROCS is 2 here: c.workers goroutines
				b.RunParallel(func(pb *testing.PB) {
					for pb.Next() {
						run()
					}
				})
			}
			b.ReportMetric(float64(derived.Load())/time.Since(start).Seconds(), "derivations/s")
		})
	}
}

// stayMessages is a ventilated stay of one patient over hours: a reading
// a minute (minute volume, tidal volume, rate, end-tidal CO2: four facts),
// an arterial blood gas every hour at half past the minute, in time order.
// gases are the effective times of the blood gases.
func stayMessages(patient string, hours int) (msgs []consumer.Message, gases []time.Time) {
	start := t0.Add(-time.Duration(hours) * time.Hour)
	for m := range hours * 60 {
		at := start.Add(time.Duration(m) * time.Minute)
		id := fmt.Sprintf("stay-%d", m)
		msgs = append(msgs, message("fhir.input.device", uint64(len(msgs)+1),
			vent(patient, id+"-ve", fhirmap.QMinuteVol, at, 9+float64(m%7)/10, "L/min"),
			vent(patient, id+"-vt", fhirmap.QTidalVol, at, 450, "mL"),
			vent(patient, id+"-rr", fhirmap.QRespRate, at, 18, "/min"),
			vent(patient, id+"-et", fhirmap.QPETCO2, at, 35, "mm[Hg]")))
		if m%60 == 30 {
			g := at.Add(30 * time.Second)
			msgs = append(msgs, message("fhir.input.lab", uint64(len(msgs)+1), abg(patient, id+"-abg", g, 45)))
			gases = append(gases, g)
		}
	}
	return msgs, gases
}

// BenchmarkIngestLongStay measures one message of a patient with a long
// stay: a ventilator reading 45 s after one of the patient's eight latest
// blood gases (so its snapshot is loaded and planned), with a stay of 8 h
// (about 2,000 facts) and of 96 h (about 23,000 facts) stored before. The
// store is then used through a new pool, as after a restart or the pool's
// hourly renewal, so the generic plans are made on the grown store; with
// stats=analysed the store is ANALYZEd first, as autovacuum would. The cost
// per message must not depend on the stay: compare ns/op across
// sub-benchmarks of one run. facts/op is the snapshot size handed to the
// plan, the same in every case.
func BenchmarkIngestLongStay(b *testing.B) {
	cases := []struct {
		name     string
		hours    int
		analysed bool
	}{
		{"stay=8h", 8, false},
		{"stay=96h", 96, false},
		{"stay=96h/stats=analysed", 96, true},
	}
	for _, c := range cases {
		b.Run(c.name, func(b *testing.B) {
			f := newFixture(b)
			var p testPlan
			history, gases := stayMessages(p1, c.hours)
			for i := 0; i < len(history); i += 64 {
				for j, r := range f.store.IngestBatch(f.ctx, history[i:min(i+64, len(history))], p.plan) {
					if r.Err != nil {
						b.Fatalf("history message %d: %v", i+j, r.Err)
					}
				}
				p.snaps = nil
			}
			if c.analysed {
				if _, err := f.pool.Exec(f.ctx, "ANALYZE"); err != nil {
					b.Fatal(err)
				}
			}
			pool, err := pgxpool.New(f.ctx, f.url)
			if err != nil {
				b.Fatal(err)
			}
			defer pool.Close()
			store := postgres.New(pool, postgres.Options{PatientKey: testKey})
			last := gases[len(gases)-8:]
			facts, n := 0, 0
			for b.Loop() {
				g := last[n%len(last)]
				m := message("fhir.input.device", uint64(len(history)+n+1),
					vent(p1, fmt.Sprintf("late-%d", n), fhirmap.QMinuteVol, g.Add(45*time.Second), 9.5, "L/min"))
				n++
				if _, err := store.Ingest(f.ctx, m, p.plan); err != nil {
					b.Fatal(err)
				}
				if len(p.snaps) != 1 || len(p.snaps[0].Affected) != 1 {
					b.Fatalf("reading after a blood gas gave %d snapshots", len(p.snaps))
				}
				facts += len(p.snaps[0].Facts)
				p.snaps = nil
			}
			b.ReportMetric(float64(facts)/float64(n), "facts/op")
		})
	}
}

// BenchmarkIngestGroupReadings records groups of 64 ventilator readings
// (four facts each, 16 patients) as the pipeline's lanes do
// (IngestBatch). With gas=none no blood gas is stored, so no reading can
// affect one: the cheap path, which should cost little more than storing
// the rows. With gas=stored each patient has a blood gas every 30 min, so
// every reading lies in a stored gas's window and its snapshot is loaded
// and planned. Reports messages per second; compare the two cases of one
// run. With gas=quarter only 4 of the 16 patients have stored gases: the
// group's other messages are cold (hotPatientsSQL) and their facts go in
// one insert for the group, the rest take the per-message path. With
// gas=group each group brings a blood gas for each of its 16 patients,
// then three readings each, nearer to the gas one after the other: every
// message is hot and derives a new version of the one before, so the
// group's writes (groupWrites) hold three versions of each key.
func BenchmarkIngestGroupReadings(b *testing.B) {
	for _, c := range []struct {
		name    string
		gas     bool
		every   int // patients i with i%every == 0 have gases
		inGroup bool
	}{{"gas=none", false, 1, false}, {"gas=quarter", true, 4, false}, {"gas=stored", true, 1, false}, {"gas=group", false, 1, true}} {
		b.Run(c.name, func(b *testing.B) {
			f := newFixture(b)
			var p testPlan
			const patients, group = 16, 64
			pat := func(i int) string { return fmt.Sprintf("Patient/lg-grp-%02d", i%patients) }
			if c.gas {
				var gases []consumer.Message
				for i := range patients * 400 {
					if (i%patients)%c.every != 0 {
						continue
					}
					at := t0.Add(time.Duration(i/patients) * 30 * time.Minute)
					gases = append(gases, message("fhir.input.lab", uint64(i+1), abg(pat(i), fmt.Sprintf("g-%d", i), at, 45)))
				}
				for i := 0; i < len(gases); i += group {
					for _, r := range f.store.IngestBatch(f.ctx, gases[i:min(i+group, len(gases))], p.plan) {
						if r.Err != nil {
							b.Fatal(r.Err)
						}
					}
				}
			}
			n := 0
			pgFrom, goFrom := backendTicks(f), selfCPU()
			start := time.Now()
			for b.Loop() {
				msgs := make([]consumer.Message, group)
				for j := range msgs {
					i := n*group + j
					// A reading a minute after a (possible) gas, per patient.
					at := t0.Add(time.Duration(i/patients)*30*time.Minute + time.Minute)
					id := fmt.Sprintf("r-%d", i)
					if c.inGroup {
						// Message j of the group: patient j%16's gas (j < 16),
						// then its readings 3, 2 and 1 min before it.
						gas := t0.Add(time.Duration(n) * 2 * time.Hour)
						if j < patients {
							msgs[j] = message("fhir.input.lab", uint64(1_000_000+i), abg(pat(i), id+"-abg", gas, 45))
							continue
						}
						msgs[j] = message("fhir.input.device", uint64(1_000_000+i),
							vent(pat(i), id+"-ve", fhirmap.QMinuteVol, gas.Add(-time.Duration(4-j/patients)*time.Minute), 9, "L/min"))
						continue
					}
					msgs[j] = message("fhir.input.device", uint64(1_000_000+i),
						vent(pat(i), id+"-ve", fhirmap.QMinuteVol, at, 9, "L/min"),
						vent(pat(i), id+"-vt", fhirmap.QTidalVol, at, 450, "mL"),
						vent(pat(i), id+"-rr", fhirmap.QRespRate, at, 18, "/min"),
						vent(pat(i), id+"-et", fhirmap.QPETCO2, at, 35, "mm[Hg]"))
				}
				n++
				for _, r := range f.store.IngestBatch(f.ctx, msgs, p.plan) {
					if r.Err != nil {
						b.Fatal(r.Err)
					}
				}
				if !c.gas && !c.inGroup && len(p.snaps) != 0 {
					b.Fatalf("%d snapshots planned without any stored blood gas", len(p.snaps))
				}
				if (c.gas || c.inGroup) && len(p.snaps) == 0 {
					b.Fatal("readings in stored gases' windows planned nothing")
				}
				p.snaps = nil
			}
			b.ReportMetric(float64(n*group)/time.Since(start).Seconds(), "msg/s")
			// CPU per message of this database's backends (a local server
			// only; 0 otherwise) and of this process: less disturbed by
			// other work on the machine than the rate.
			b.ReportMetric(float64(backendTicks(f)-pgFrom)*1e4/float64(n*group), "pg-cpu-us/msg")
			b.ReportMetric(float64((selfCPU()-goFrom).Microseconds())/float64(n*group), "go-cpu-us/msg")
		})
	}
}

// backendTicks sums the CPU clock ticks (1/100 s, Linux's USER_HZ) of the
// server processes connected to f's database, read from /proc: 0 when the
// server is not on this machine.
func backendTicks(f *fixture) int64 {
	rows, err := f.pool.Query(f.ctx, `SELECT pid FROM pg_stat_activity WHERE datname = current_database()`)
	if err != nil {
		return 0
	}
	pids, err := pgx.CollectRows(rows, pgx.RowTo[int32])
	if err != nil {
		return 0
	}
	var t int64
	for _, pid := range pids {
		b, err := os.ReadFile(fmt.Sprintf("/proc/%d/stat", pid))
		if err != nil {
			continue
		}
		// After the name: state ppid ... utime(11) stime(12).
		fs := strings.Fields(string(b[bytes.LastIndexByte(b, ')')+1:]))
		if len(fs) > 12 {
			u, _ := strconv.ParseInt(fs[11], 10, 64)
			st, _ := strconv.ParseInt(fs[12], 10, 64)
			t += u + st
		}
	}
	return t
}

// selfCPU is the CPU time of this process.
func selfCPU() time.Duration {
	var ru syscall.Rusage
	if err := syscall.Getrusage(syscall.RUSAGE_SELF, &ru); err != nil {
		return 0
	}
	return time.Duration(ru.Utime.Nano() + ru.Stime.Nano())
}
