package consumer

import (
	"fmt"
	"slices"
	"strings"
	"time"

	"github.com/ventderive/ventderive/fhirmap"
	"github.com/ventderive/ventderive/physio"
)

// Planner turns a patient's snapshot into the changes to record and publish.
// It holds only configuration: Plan is a pure function of its arguments, so
// a retried transaction plans the same changes again.
type Planner struct {
	Site           fhirmap.Site
	ObservationSub string
	ProvenanceSub  string
	// AliasDigest is the hex SHA-256 of the site's code alias file, ""
	// when there is none; it is part of the settings snapshot.
	AliasDigest string
}

// Settings returns the snapshot of the settings the planner derives under.
func (p Planner) Settings() (SettingsSnapshot, error) {
	return Settings{Algorithm: fhirmap.Algorithm, AliasDigest: p.AliasDigest, Site: p.Site}.Snapshot()
}

// Plan recomputes every affected blood gas of the snapshot and compares the
// result with what is stored. A derivation whose content is unchanged is left
// alone; a changed one gets a new version (status amended or corrected once a
// version was published); a value that can no longer be derived (its blood gas
// was entered in error, or an input it needs was withdrawn) is retracted: a
// new version with status entered-in-error, published like any other.
// recorded is the time written into Provenance.recorded.
func (p Planner) Plan(snap Snapshot, recorded time.Time) (Changes, error) {
	// Current versions, then only this patient's: a fact whose current
	// version names another patient (a corrected subject) no longer counts
	// here, and what it supported is recomputed or withdrawn.
	var facts []fhirmap.Fact
	for _, f := range fhirmap.Current(snap.Facts) {
		if f.Patient == snap.Patient {
			facts = append(facts, f)
		}
	}
	current := make(map[string]Stored, len(snap.Current))
	for _, s := range snap.Current {
		current[s.Key] = s
	}
	// bloodGas holds, per key, the fact a retraction names and takes its
	// time and encounter from: this patient's latest version, whatever it
	// now measures (a blood gas re-coded by the lab is no longer a PCO2,
	// and one moved to another patient is no longer this patient's, but
	// the values derived from it here must still be withdrawn).
	var own []fhirmap.Fact
	for _, f := range snap.Facts {
		if f.Patient == snap.Patient {
			own = append(own, f)
		}
	}
	bloodGas := make(map[string]fhirmap.Fact, len(snap.Affected))
	for _, f := range fhirmap.Current(own) {
		bloodGas[f.Key] = f
	}

	var ch Changes
	affected := slices.Clone(snap.Affected)
	slices.Sort(affected)
	for _, key := range slices.Compact(affected) {
		derived, refused := fhirmap.DeriveBloodGas(key, facts, p.Site)
		seen := make(map[string]bool, len(derived)+len(refused))
		for _, d := range derived {
			seen[d.Key] = true
			cur, ok := current[d.Key]
			if ok && !cur.Refused && cur.Status != fhirmap.StatusEnteredInError {
				// Same content under the status it already has: nothing to do.
				same := d
				same.Status = cur.Status
				same.Seal()
				if same.Digest == cur.Digest {
					continue
				}
				d.Status = revisedStatus(d.Status, cur.Status, bloodGas[key].Status)
				d.Seal()
			}
			if err := p.emit(&ch, d, nextVersion(cur, ok), recorded); err != nil {
				return Changes{}, err
			}
		}
		for _, r := range refused {
			seen[r.Key] = true
			cur, ok := current[r.Key]
			if ok && cur.Refused && cur.Digest == r.Digest {
				continue
			}
			version := nextVersion(cur, ok)
			if ok && !cur.Refused && cur.Status != fhirmap.StatusEnteredInError {
				// A published value whose basis is gone is withdrawn before the
				// refusal is recorded, so consumers do not keep acting on it.
				if err := p.emit(&ch, retraction(cur, bloodGas[key], snap.Patient, r.Reason), version, recorded); err != nil {
					return Changes{}, err
				}
			}
			ch.Refusals = append(ch.Refusals, r)
		}
		// Keys derived before that this run produced nothing for at all.
		prefix := fhirmap.DerivationKey(snap.Patient, key, "") // "<patient>|<blood gas>|"
		for _, cur := range snap.Current {
			if seen[cur.Key] || cur.Refused || cur.Status == fhirmap.StatusEnteredInError || !strings.HasPrefix(cur.Key, prefix) {
				continue
			}
			if err := p.emit(&ch, retraction(cur, bloodGas[key], snap.Patient, fhirmap.ReasonBasisWithdrawn), cur.Version+1, recorded); err != nil {
				return Changes{}, err
			}
		}
	}
	if len(ch.Derivations) > 0 || len(ch.Refusals) > 0 {
		snap, err := p.Settings()
		if err != nil {
			return Changes{}, err
		}
		ch.Settings = snap
	}
	return ch, nil
}

func nextVersion(cur Stored, ok bool) int {
	if !ok {
		return 1
	}
	return cur.Version + 1
}

// revisedStatus is the status of a new version of a published derivation
// (FHIR R4 ObservationStatus): it stays preliminary while any input is;
// a preliminary value that becomes final is "final" (amended and corrected
// mean a change after a final result); after a final result it is
// "corrected" when the blood gas was corrected and "amended" otherwise.
func revisedStatus(computed, published, bloodGas fhirmap.Status) fhirmap.Status {
	switch {
	case computed == fhirmap.StatusPreliminary:
		return fhirmap.StatusPreliminary
	case published == fhirmap.StatusPreliminary:
		return computed
	case bloodGas == fhirmap.StatusCorrected:
		return fhirmap.StatusCorrected
	default:
		return fhirmap.StatusAmended
	}
}

// retraction builds the entered-in-error version of a published derivation.
func retraction(cur Stored, bloodGas fhirmap.Fact, patient, reason string) fhirmap.Derivation {
	d := fhirmap.Derivation{
		Key:       cur.Key,
		ID:        fhirmap.DerivationID(cur.Key),
		Kind:      cur.Kind,
		Patient:   patient,
		Encounter: bloodGas.Encounter,
		Effective: bloodGas.Effective,
		BloodGas:  bloodGas.Key,
		Result: physio.Result{
			Value:  cur.Value,
			Unit:   fhirmap.KindUnit(cur.Kind),
			Method: "retraction",
		},
		Status:    fhirmap.StatusEnteredInError,
		Algorithm: fhirmap.Algorithm,
		Retracted: reason,
	}
	if bloodGas.Key != "" {
		d.Inputs = []fhirmap.Input{{Role: fhirmap.RoleBloodGas, Fact: bloodGas}}
	}
	d.Seal()
	return d
}

// emit records a derivation version and its two outbox messages.
func (p Planner) emit(ch *Changes, d fhirmap.Derivation, version int, recorded time.Time) error {
	obs, err := fhirmap.EncodeObservation(d, version, p.Site)
	if err != nil {
		return fmt.Errorf("encode observation: %w", err)
	}
	prov, err := fhirmap.EncodeProvenance(d, version, recorded, p.Site)
	if err != nil {
		return fmt.Errorf("encode provenance: %w", err)
	}
	header := map[string]string{
		HeaderContentType: FHIRContentType,
		HeaderKind:        d.Kind,
		HeaderStatus:      string(d.Status),
		HeaderAlgorithm:   d.Algorithm,
	}
	msgID := fmt.Sprintf("%s/_history/%d", d.ID, version)
	ch.Derivations = append(ch.Derivations, d)
	ch.Versions = append(ch.Versions, version)
	ch.Outbox = append(ch.Outbox,
		OutboxMessage{Subject: p.ObservationSub, MsgID: "Observation/" + msgID, Header: header, Payload: obs},
		OutboxMessage{Subject: p.ProvenanceSub, MsgID: "Provenance/" + msgID, Header: header, Payload: prov},
	)
	return nil
}
