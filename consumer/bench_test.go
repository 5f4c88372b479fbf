package consumer_test

import (
	"testing"
	"time"

	"github.com/ventderive/ventderive/consumer"
	"github.com/ventderive/ventderive/fhirmap"
)

// Benchmarks of the pipeline's CPU work per input message, without NATS or
// PostgreSQL, so that a regression shows up in `go test -bench`. Inputs come
// from the synthetic generator of gen_test.go (the reference vector of
// shared/reference/physiology.md §11 with small variation): one patient's
// demographics, the ventilator readings of one blood gas's window (every
// 5 min from 25 min before to 5 min after, five quantities each) and the gas.

// benchInputs returns the raw messages of one blood gas window and the facts
// they decode to.
func benchInputs(b *testing.B) (vent, gas testMsg, facts []fhirmap.Fact) {
	b.Helper()
	msgs := append(patientMsgs(0), ventMsgs(0, 0, 5*time.Minute)...)
	gas = gasMsg(0, 0, gasValue(0, 0), 1, "final")
	msgs = append(msgs, gas)
	for _, m := range msgs {
		d, err := fhirmap.Decode(m.payload, fhirmap.DefaultCodes())
		if err != nil {
			b.Fatalf("benchmark input does not decode: %v", err)
		}
		facts = append(facts, d.Facts...)
	}
	return ventMsgs(0, 0, 5*time.Minute)[0], gas, facts
}

func benchSite() fhirmap.Site {
	s := fhirmap.DefaultSite()
	s.ApparatusDeadSpaceML, s.ApparatusDeadSpaceConfigured = 50, true
	return s
}

// BenchmarkDecodeNormaliseDerive is the CPU the pipeline spends on one
// input outside the store: strict decode and unit normalisation of the
// message (fhirmap.Decode), and for a blood gas the derivation of every kind
// from the facts of its window (fhirmap.DeriveBloodGas). Target: under 30 us
// per input on the 2-core reference machine.
func BenchmarkDecodeNormaliseDerive(b *testing.B) {
	vent, gas, facts := benchInputs(b)
	codes, site := fhirmap.DefaultCodes(), benchSite()
	gasKey := ""
	for _, f := range facts {
		if f.Quantity == fhirmap.QPCO2 {
			gasKey = f.Key
		}
	}
	b.Run("input=ventilator-reading", func(b *testing.B) {
		b.ReportAllocs()
		b.SetBytes(int64(len(vent.payload)))
		for b.Loop() {
			if _, err := fhirmap.Decode(vent.payload, codes); err != nil {
				b.Fatal(err)
			}
		}
	})
	b.Run("input=blood-gas", func(b *testing.B) {
		b.ReportAllocs()
		b.SetBytes(int64(len(gas.payload)))
		for b.Loop() {
			if _, err := fhirmap.Decode(gas.payload, codes); err != nil {
				b.Fatal(err)
			}
			derived, _ := fhirmap.DeriveBloodGas(gasKey, facts, site)
			if len(derived) == 0 {
				b.Fatal("nothing derived")
			}
		}
	})
}

// BenchmarkPlan is Planner.Plan for the snapshot one message hands it: a new
// blood gas (every kind derived and encoded as Observation and Provenance),
// and a late ventilator reading that changes nothing (the common case: each
// derivation is recomputed and found equal to the stored head).
func BenchmarkPlan(b *testing.B) {
	_, _, facts := benchInputs(b)
	site := benchSite()
	planner := consumer.Planner{Site: site, ObservationSub: consumer.DefaultObservationSub, ProvenanceSub: consumer.DefaultProvenanceSub}
	var gasKey string
	for _, f := range facts {
		if f.Quantity == fhirmap.QPCO2 {
			gasKey = f.Key
		}
	}
	snap := consumer.Snapshot{Patient: patientRef(0), Facts: facts, Affected: []string{gasKey}}
	recorded := genStart.Add(3 * time.Hour)
	first, err := planner.Plan(snap, recorded)
	if err != nil || len(first.Derivations) == 0 {
		b.Fatalf("plan of a new blood gas: %d derivations, %v", len(first.Derivations), err)
	}
	// The heads as the store would hold them after the first plan.
	unchanged := snap
	for i, d := range first.Derivations {
		unchanged.Current = append(unchanged.Current, consumer.Stored{Key: d.Key, Kind: d.Kind, Version: first.Versions[i],
			Digest: d.Digest, Status: d.Status, Value: d.Result.Value})
	}
	for _, r := range first.Refusals {
		unchanged.Current = append(unchanged.Current, consumer.Stored{Key: r.Key, Kind: r.Kind, Digest: r.Digest, Refused: true})
	}
	if ch, err := planner.Plan(unchanged, recorded); err != nil || len(ch.Derivations)+len(ch.Refusals) != 0 {
		b.Fatalf("re-plan with equal heads changed %d derivations and %d refusals (%v): not the steady state", len(ch.Derivations), len(ch.Refusals), err)
	}
	for _, c := range []struct {
		name string
		snap consumer.Snapshot
	}{
		{"snapshot=new-blood-gas", snap},
		{"snapshot=unchanged", unchanged},
	} {
		b.Run(c.name, func(b *testing.B) {
			b.ReportAllocs()
			for b.Loop() {
				if _, err := planner.Plan(c.snap, recorded); err != nil {
					b.Fatal(err)
				}
			}
		})
	}
}
