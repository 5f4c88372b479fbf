package scenario

import (
	"bytes"
	"crypto/sha256"
	"encoding/hex"
	"errors"
	"math"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/ventderive/ventderive/fhirmap"
	"github.com/ventderive/ventderive/physio"
)

// TestServiceDecodesScenario feeds every message to the service's decoder:
// well-formed messages decode without error and nothing clinical is ignored,
// malformed ones fail with the intended reason.
func TestServiceDecodesScenario(t *testing.T) {
	sc, _ := generated(t, Options{Seed: 4, Duration: MinDuration, VentEvery: 2 * time.Minute})
	quantities := map[string]map[fhirmap.Quantity]int{} // patient -> quantity -> facts
	specimens := map[string]map[fhirmap.Specimen]int{}
	for i, m := range sc.Messages {
		d, err := fhirmap.Decode(m.Payload, nil)
		if m.Malformed {
			var de *fhirmap.DecodeError
			if !errors.As(err, &de) || de.Reason != m.DeadLetterReason {
				t.Errorf("message %d (%s): err %v, want reason %s", i, m.Patient, err, m.DeadLetterReason)
			}
			if m.DeadLetterReason == DeadLetterNoSubject && de != nil && !strings.Contains(de.Field, "subject") {
				t.Errorf("message %d: missing field %q, want the subject", i, de.Field)
			}
			continue
		}
		if err != nil {
			t.Fatalf("message %d (%s, %s): %v", i, m.Subject, m.Patient, err)
		}
		if len(d.Facts) == 0 {
			t.Fatalf("message %d (%s): no facts", i, m.Subject)
		}
		for _, ig := range d.Ignored {
			// A hasMember panel carries no value of its own (its members
			// do), and a MessageHeader no clinical data: both are expected.
			if ig.Reason != "panel" && ig.Reason != "message-header" {
				t.Errorf("message %d (%s): ignored %+v", i, m.Subject, ig)
			}
		}
		for _, f := range d.Facts {
			if f.Patient != m.Patient {
				t.Fatalf("message %d: fact of %s in a message of %s", i, f.Patient, m.Patient)
			}
			if math.IsNaN(f.Value) || math.IsInf(f.Value, 0) {
				t.Fatalf("message %d: %s not finite", i, f.Key)
			}
			if quantities[f.Patient] == nil {
				quantities[f.Patient] = map[fhirmap.Quantity]int{}
				specimens[f.Patient] = map[fhirmap.Specimen]int{}
			}
			quantities[f.Patient][f.Quantity]++
			if f.Quantity == fhirmap.QPCO2 {
				specimens[f.Patient][f.Specimen]++
			}
		}
	}
	for _, p := range sc.Patients {
		q := quantities[p.Ref]
		for _, need := range []fhirmap.Quantity{fhirmap.QPCO2, fhirmap.QMinuteVol, fhirmap.QTidalVol, fhirmap.QRespRate,
			fhirmap.QPETCO2, fhirmap.QFiO2, fhirmap.QHeight, fhirmap.QWeight, fhirmap.QBodyTemp, fhirmap.QSex, fhirmap.QBirthDate} {
			if q[need] == 0 {
				t.Errorf("%s: no %s facts", p.Label, need)
			}
		}
		if (q[fhirmap.QVCO2] > 0) != p.VCO2Measured {
			t.Errorf("%s: %d VCO2 facts, VCO2Measured %v", p.Label, q[fhirmap.QVCO2], p.VCO2Measured)
		}
		venous := p.Bed == 7
		if venous != (specimens[p.Ref][fhirmap.SpecimenVenous] > 0) || venous == (specimens[p.Ref][fhirmap.SpecimenArterial] > 0) {
			t.Errorf("%s: PCO2 specimens %v", p.Label, specimens[p.Ref])
		}
	}
}

// TestExpectationsHoldOffline runs the whole scenario through the service's
// decoder and derivation (no bus, no database; all messages at once, so late
// arrivals are already in place) with the site settings the scenario
// assumes, and checks every patient's Expectation and a few story values.
func TestExpectationsHoldOffline(t *testing.T) {
	sc, _ := generated(t, Options{Seed: 4, Duration: MinDuration, VentEvery: 2 * time.Minute})
	var facts []fhirmap.Fact
	for _, m := range sc.Messages {
		if m.Malformed {
			continue
		}
		d, err := fhirmap.Decode(m.Payload, nil)
		if err != nil {
			t.Fatalf("decode: %v", err)
		}
		facts = append(facts, d.Facts...)
	}
	site := fhirmap.DefaultSite()
	site.ApparatusDeadSpaceML, site.ApparatusDeadSpaceConfigured = ApparatusDeadSpaceML, true
	site.Window = fhirmap.Window{Before: PairingBefore, After: PairingAfter}
	ds, rs := fhirmap.DeriveAll(facts, site)

	for _, p := range sc.Patients {
		t.Run(strings.ReplaceAll(p.Label, " ", "_"), func(t *testing.T) {
			derivedGases := map[string]bool{}
			seen := map[string]int{}
			vr := []float64{}
			for _, d := range ds {
				if d.Patient != p.Ref || d.Status == fhirmap.StatusEnteredInError {
					continue
				}
				derivedGases[d.BloodGas] = true
				// Every value lies in the range the story states, and no
				// measured PaCO2 is flagged implausibly below predicted.
				for _, r := range p.Expect.Ranges {
					if r.Kind == d.Kind && (d.Result.Value < r.Min || d.Result.Value > r.Max) {
						t.Errorf("%s %s = %.3f outside the story's %g..%g", d.BloodGas, d.Kind, d.Result.Value, r.Min, r.Max)
					}
				}
				seen[d.Kind]++
				if slices.Contains(d.Result.Flags(), physio.FlagPaCO2BelowPredicted) {
					t.Errorf("%s %s flagged: %s", d.BloodGas, d.Kind, physio.FlagPaCO2BelowPredicted)
				}
				if d.Kind == fhirmap.KindVentilatoryRatio {
					vr = append(vr, d.Result.Value)
				}
			}
			for _, r := range p.Expect.Ranges {
				if seen[r.Kind] == 0 {
					t.Errorf("the story states a range for %s but none was derived", r.Kind)
				}
			}
			reasons := map[string]bool{}
			for _, r := range rs {
				if r.Patient == p.Ref {
					reasons[r.Reason] = true
				}
			}
			if len(derivedGases) < p.Expect.MinDerived {
				t.Errorf("%d blood gases with derived values, expectation at least %d", len(derivedGases), p.Expect.MinDerived)
			}
			for _, want := range p.Expect.Refusals {
				if !reasons[want] {
					t.Errorf("no refusal %s; refusals %v", want, reasons)
				}
			}
			if p.Expect.Retracted > 0 && !reasons[fhirmap.ReasonEnteredInError] {
				t.Errorf("the entered-in-error gas is not refused as such; refusals %v", reasons)
			}
			// The service's ventilatory ratio agrees with the story
			// (Sinha 2009: near 1 in healthy lungs; ARDS about 2).
			switch p.Bed {
			case 1:
				for _, v := range vr {
					if !between(v, 0.75, 1.25) {
						t.Errorf("ventilatory ratio %.2f", v)
					}
				}
			case 2:
				if len(vr) < 2 || !(vr[len(vr)-1] > vr[0]) {
					t.Errorf("ventilatory ratio %v not rising", vr)
				}
			}
		})
	}
}

// TestResourcesInsidePayload checks what the store relies on since migration
// 0011 (it keeps each message's bytes in its inbox row and no copy per
// resource): every resource the decoder accepts is a byte-for-byte part of
// the message payload, and its digest is the SHA-256 of those bytes
// (FIPS 180-4, checked with crypto/sha256).
func TestResourcesInsidePayload(t *testing.T) {
	sc, _ := generated(t, Options{Seed: 4, Duration: MinDuration, VentEvery: 2 * time.Minute})
	checked := 0
	for i, m := range sc.Messages {
		if m.Malformed {
			continue
		}
		d, err := fhirmap.Decode(m.Payload, nil)
		if err != nil {
			t.Fatalf("message %d: %v", i, err)
		}
		for _, r := range d.Resources {
			if len(r.Raw) == 0 || !bytes.Contains(m.Payload, r.Raw) {
				t.Fatalf("message %d: resource %s is not a part of the payload", i, r.Reference)
			}
			if sum := sha256.Sum256(r.Raw); hex.EncodeToString(sum[:]) != r.Digest {
				t.Fatalf("message %d: resource %s digest %s is not of its bytes", i, r.Reference, r.Digest)
			}
			checked++
		}
	}
	if checked < 100 {
		t.Fatalf("only %d resources checked", checked)
	}
}
