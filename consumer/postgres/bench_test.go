package postgres_test

import (
	"fmt"
	"sync/atomic"
	"testing"
	"time"

	"github.com/google/uuid"
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
