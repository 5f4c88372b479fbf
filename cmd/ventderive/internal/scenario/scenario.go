package scenario

import (
	"crypto/sha256"
	"encoding/hex"
	"fmt"
	"math"
	"math/rand/v2"
	"slices"
	"time"
)

// Names of the invented site.
const (
	Hospital = "Larkspur General Hospital"
	Unit     = "ICU 3 West"
)

// Subjects the scenario publishes on, under DefaultSubjectPrefix (they match
// consumer.DefaultInputSubjects). A publisher may swap the prefix.
const (
	DefaultSubjectPrefix = "fhir.input"
	SubjectLab           = DefaultSubjectPrefix + ".lab"    // blood gases from the laboratory
	SubjectDevice        = DefaultSubjectPrefix + ".device" // ventilator and monitor readings
	SubjectADT           = DefaultSubjectPrefix + ".adt"    // Patient resources, height and weight on admission
)

// Defaults of Options.
const (
	DefaultDuration  = 24 * time.Hour
	DefaultVentEvery = time.Minute
	// MinDuration is the shortest span in which every story fits (three
	// blood gases per patient, the amendment and the retraction after the
	// middle one). Shorter durations are raised to it.
	MinDuration = 6 * time.Hour
)

// DefaultStart is the simulated start when Options.Start is zero: an
// invented Monday morning, 07:00 at UTC+01:00.
var DefaultStart = time.Date(2026, time.March, 2, 7, 0, 0, 0, time.FixedZone("+01:00", 3600))

// Settings the stories assume; the demo configures the service to match.
const (
	// ApparatusDeadSpaceML is the site apparatus dead space, mL: a
	// heat-moisture exchanger and catheter mount (studied range 25-95 mL,
	// reference/physiology.md section 7).
	ApparatusDeadSpaceML = 50
	// PairingBefore and PairingAfter are the pairing window the expectations
	// are computed with: consumer.DefaultConfig's Window.
	PairingBefore = 30 * time.Minute
	PairingAfter  = 10 * time.Minute
)

// Refusal reason codes the stories must produce (the service's reason codes).
const (
	ReasonVenous         = "venous-specimen"
	ReasonNoVentInWindow = "no-ventilator-data-in-window"
	// ReasonNoVCO2 is expected for beds without measured VCO2 that have
	// paired blood gases: the measured-VCO2 kinds are refused there.
	ReasonNoVCO2 = "no-vco2"
)

// Dead-letter reasons the malformed messages are meant to produce: the
// decoder's reason codes (fhirmap.DecodeError.Reason).
const (
	DeadLetterInvalidJSON  = "malformed-json"
	DeadLetterResourceType = "wrong-resource-type"
	DeadLetterNoSubject    = "missing-field" // Observation.subject
	DeadLetterUnknownUnit  = "unknown-unit"
)

// Options control Generate. The zero value is valid.
type Options struct {
	// Seed selects the noise and the small jitter of blood-gas times. Same
	// Options, same bytes.
	Seed int64
	// Start is the simulated start, with the zone every effectiveDateTime
	// is written in. Default DefaultStart.
	Start time.Time
	// Duration is the simulated span. Default DefaultDuration (24 h);
	// raised to MinDuration (6 h) when shorter.
	Duration time.Duration
	// VentEvery is the interval of ventilator readings. Default
	// DefaultVentEvery (1 min); at most 10 min, so that every blood gas
	// with a running feed has a reading in its pairing window.
	VentEvery time.Duration
}

// normalize applies the documented defaults and bounds.
func (o Options) normalize() Options {
	if o.Start.IsZero() {
		o.Start = DefaultStart
	}
	o.Start = o.Start.Truncate(time.Second)
	if o.Duration <= 0 {
		o.Duration = DefaultDuration
	}
	if o.Duration < MinDuration {
		o.Duration = MinDuration
	}
	if o.VentEvery <= 0 {
		o.VentEvery = DefaultVentEvery
	}
	if o.VentEvery < time.Second {
		o.VentEvery = time.Second
	}
	if o.VentEvery > 10*time.Minute {
		o.VentEvery = 10 * time.Minute
	}
	return o
}

// Scenario is one generated day.
type Scenario struct {
	Hospital string
	Unit     string
	Start    time.Time     // the simulated start, after defaults
	Duration time.Duration // the simulated span, after defaults
	Patients []Patient
	// Messages are sorted by At; ties keep generation order.
	Messages []Message
}

// Patient is one bed's story and what the service must make of it.
type Patient struct {
	Ref   string // "Patient/lg-icu-0001": invented
	Bed   int
	Label string // bed and short story title
	Story string // what a clinician should see in the derived values
	// VCO2Measured says whether the ventilator sends VCO2 (LOINC 60825-7);
	// without it the measured-VCO2 derivations are refused and dead space
	// can only be estimated.
	VCO2Measured bool
	Expect       Expectation
}

// Expectation is what the demo summary checks for one patient after the
// whole scenario has been processed.
type Expectation struct {
	// BloodGases counts the blood-gas reports sent (a report and its later
	// versions count once; dead-lettered messages not at all).
	BloodGases int
	// MinDerived is the least number of current derived values: one per
	// arterial blood gas with ventilator data in the pairing window that was
	// not entered in error (the ventilatory ratio needs no VCO2).
	MinDerived int
	// Refusals are reason codes that must appear among the patient's
	// refusals (others, such as for lack of VCO2, may appear too).
	Refusals []string
	// Amended counts blood gases later amended; Retracted those later
	// entered in error, whose derived values must end retracted.
	Amended   int
	Retracted int
	// DeadLetters counts the patient's malformed messages.
	DeadLetters int
	// Ranges are the ranges the patient's current derived values must lie
	// in, one per kind the story states (VD/VT from VCO2, ventilatory
	// ratio, arterial to end-tidal gradient, measured minus predicted
	// PaCO2). They follow from the story's model (physiologic dead space at
	// least anatomic plus apparatus plus 0.05 of VT of alveolar dead space),
	// widened by the noise of the readings; measured minus predicted PaCO2
	// never goes below DiscrepancyFloor. Empty when nothing is derived.
	Ranges []ValueRange
}

// Message is one input message to publish.
type Message struct {
	At      time.Time // simulated time the message is sent
	Subject string    // SubjectLab, SubjectDevice or SubjectADT
	// MsgID is for Nats-Msg-Id: "sim-" and the first 32 hex digits of the
	// SHA-256 of subject and payload, so a republish is deduplicated.
	MsgID   string
	Payload []byte // FHIR JSON, or the malformed bytes
	Patient string // patient reference, for progress display only
	// Malformed marks a message that must become a dead letter, for the
	// reason in DeadLetterReason.
	Malformed        bool
	DeadLetterReason string
}

// Generate builds the scenario for o. It is deterministic: equal Options
// give equal Scenarios, byte for byte. It does not fail.
func Generate(o Options) Scenario {
	o = o.normalize()
	sc := Scenario{Hospital: Hospital, Unit: Unit, Start: o.Start, Duration: o.Duration}
	var all []Message
	for _, st := range stories() {
		g := &generator{
			o:   o,
			st:  st,
			ref: fmt.Sprintf("Patient/lg-icu-%04d", st.bed),
			enc: fmt.Sprintf("Encounter/lg-enc-%04d", st.bed),
			// One stream per bed, so that a bed's values do not depend on
			// how many draws the other beds made.
			rng: rand.New(rand.NewPCG(uint64(o.Seed), 0x1ca7_0000+uint64(st.bed))),
		}
		p := g.run()
		sc.Patients = append(sc.Patients, p)
		all = append(all, g.msgs...)
	}
	slices.SortStableFunc(all, func(a, b Message) int { return a.At.Compare(b.At) })
	for i := range all {
		h := sha256.New()
		h.Write([]byte(all[i].Subject))
		h.Write([]byte{0})
		h.Write(all[i].Payload)
		all[i].MsgID = "sim-" + hex.EncodeToString(h.Sum(nil))[:32]
	}
	sc.Messages = all
	return sc
}

// generator makes one bed's messages.
type generator struct {
	o    Options
	st   story
	ref  string
	enc  string
	rng  *rand.Rand
	msgs []Message
}

// gas is one blood-gas draw.
type gas struct {
	k         int
	effective time.Time
	st        state
	paCO2     float64 // as measured, mm[Hg] (venous PCO2 for a venous draw)
	paO2      float64
	pH        float64
	hco3      float64
	be        float64
}

func (g *generator) end() time.Time { return g.o.Start.Add(g.o.Duration) }

// frac is the fraction of the simulated span at t.
func (g *generator) frac(t time.Time) float64 {
	f := float64(t.Sub(g.o.Start)) / float64(g.o.Duration)
	return math.Min(1, math.Max(0, f))
}

func (g *generator) emit(at time.Time, subject string, payload []byte) {
	g.msgs = append(g.msgs, Message{At: at, Subject: subject, Payload: payload, Patient: g.ref})
}

func (g *generator) emitBad(at time.Time, subject string, payload []byte, reason string) {
	g.msgs = append(g.msgs, Message{At: at, Subject: subject, Payload: payload, Patient: g.ref,
		Malformed: true, DeadLetterReason: reason})
}

func (g *generator) run() Patient {
	st := g.st
	p := Patient{Ref: g.ref, Bed: st.bed, Label: st.label, Story: st.text, VCO2Measured: st.vco2Measured}

	g.admission()

	// Blood-gas schedule: about every four hours, at least three, evenly
	// spread with a little seeded jitter (a draw is never exactly on time).
	n := int(math.Round(float64(g.o.Duration) / float64(4*time.Hour)))
	n = max(n, 3)
	interval := g.o.Duration / time.Duration(n)
	jitterMax := min(20*time.Minute, interval/8)
	gasTimes := make([]time.Time, n)
	for k := range n {
		j := time.Duration((g.rng.Float64()*2 - 1) * float64(jitterMax))
		t := g.o.Start.Add(interval*time.Duration(k) + interval/2 + j).Truncate(time.Second)
		// A bed-dependent second so that beds do not share time stamps.
		gasTimes[k] = t.Add(time.Duration(st.bed) * time.Second)
	}

	// The ventilator feed of a feedStops bed ends 20 minutes after the last
	// blood gas before the middle of the span: that gas is still paired, the
	// next one (at least an interval minus jitter later) is not.
	feedEnd := g.end()
	if st.feedStops {
		feedEnd = gasTimes[n/2-1].Add(20 * time.Minute)
	}
	readings := g.ventilator(feedEnd, gasTimes)
	g.temperatures()

	gases := make([]gas, n)
	for k, t := range gasTimes {
		gases[k] = g.draw(k, t)
		g.labReport(gases[k])
	}
	g.malformed(gasTimes)

	// Expectations follow from what was actually generated.
	refusals := map[string]bool{}
	for k, t := range gasTimes {
		p.Expect.BloodGases++
		if k == st.amendGas {
			p.Expect.Amended++
		}
		if k == st.errorGas {
			p.Expect.Retracted++
			continue
		}
		if st.venous {
			refusals[ReasonVenous] = true
			continue
		}
		if !hasReadingIn(readings, t.Add(-PairingBefore), t.Add(PairingAfter)) {
			refusals[ReasonNoVentInWindow] = true
			continue
		}
		p.Expect.MinDerived++
	}
	if !st.vco2Measured && p.Expect.MinDerived > 0 {
		refusals[ReasonNoVCO2] = true
	}
	for r := range refusals {
		p.Expect.Refusals = append(p.Expect.Refusals, r)
	}
	slices.Sort(p.Expect.Refusals)
	if st.malformed != wellFormed {
		p.Expect.DeadLetters = 1
	}
	if p.Expect.MinDerived > 0 {
		for _, r := range st.ranges {
			if r.Kind == KindDeadSpaceVCO2 || r.Kind == KindDiscrepancy {
				if !st.vco2Measured {
					continue
				}
			}
			p.Expect.Ranges = append(p.Expect.Ranges, r)
		}
	}
	return p
}

func hasReadingIn(readings []time.Time, from, to time.Time) bool {
	for _, t := range readings {
		if !t.Before(from) && !t.After(to) {
			return true
		}
	}
	return false
}

// admission sends the Patient resource, then body height and weight.
func (g *generator) admission() {
	st := g.st
	id := fmt.Sprintf("lg-icu-%04d", st.bed)
	at := g.o.Start.Add(time.Duration(st.bed) * 2 * time.Second)
	g.emit(at, SubjectADT, mustJSON(jsonPatient{
		ResourceType: "Patient", ID: id,
		Meta:       &jsonMeta{VersionID: "1", LastUpdated: fhirTime(at)},
		Identifier: []jsonIdentifier{{System: systemMRN, Value: fmt.Sprintf("LG%06d", 900000+st.bed)}},
		Active:     true, Gender: st.gender, BirthDate: st.birthDate,
	}))

	at = at.Add(30 * time.Second)
	height, weight := qty(st.heightCm, 0, unitCm), qty(st.weightKg, 1, unitKg)
	if st.imperialBody {
		height = qty(st.heightCm/2.54, 1, unitIn)       // 1 [in_i] = 2.54 cm (UCUM)
		weight = qty(st.weightKg/0.45359237, 1, unitLb) // 1 [lb_av] = 0.45359237 kg (UCUM)
	}
	for _, b := range []struct {
		suffix string
		c      code
		q      *jsonQuantity
	}{{"height", loincHeight, height}, {"weight", loincWeight, weight}} {
		g.emit(at, SubjectADT, mustJSON(jsonObservation{
			ResourceType: "Observation", ID: fmt.Sprintf("lg-%04d-%s", st.bed, b.suffix),
			Meta: &jsonMeta{VersionID: "1"}, Status: "final",
			Category: []jsonConcept{concept(categoryVital)}, Code: concept(b.c),
			Subject: &jsonRef{Reference: g.ref}, Encounter: &jsonRef{Reference: g.enc},
			EffectiveDateTime: fhirTime(g.o.Start), ValueQuantity: b.q,
		}))
	}
}

// temperatures sends the monitor's body temperature every hour.
func (g *generator) temperatures() {
	st := g.st
	for h := 0; ; h++ {
		eff := g.o.Start.Add(time.Duration(h)*time.Hour + 10*time.Minute + time.Duration(st.bed)*3*time.Second)
		at := eff.Add(5 * time.Second)
		if !at.Before(g.end()) {
			return
		}
		t := st.at(g.frac(eff)).tempC + 0.1*g.rng.NormFloat64()
		q := qty(t, 1, unitCel)
		c := concept(loincTemp)
		if st.coreTemp {
			// As the MII-ICU oesophageal profile codes it: the vital-signs
			// code and the site's.
			c = concept(loincTemp, loincTempEso)
		}
		if st.tempF {
			q = qty(t*9/5+32, 1, unitDegF) // Fahrenheit = Celsius x 9/5 + 32 (UCUM [degF])
		}
		g.emit(at, SubjectDevice, mustJSON(jsonObservation{
			ResourceType: "Observation", ID: fmt.Sprintf("lg-%04d-temp-%03d", st.bed, h), Status: "final",
			Category: []jsonConcept{concept(categoryVital)}, Code: c,
			Subject: &jsonRef{Reference: g.ref}, Encounter: &jsonRef{Reference: g.enc},
			EffectiveDateTime: fhirTime(eff), ValueQuantity: q,
		}))
	}
}

// reading is one ventilator value with the codings its feed uses.
type reading struct {
	suffix string
	codes  []code
	q      *jsonQuantity
}

// ventilator sends a reading every VentEvery until feedEnd and returns the
// effective times of the readings sent. For a lateVentGas bed, the last
// reading at or before that blood gas is held back by the gateway and sent
// five minutes after the blood-gas report.
func (g *generator) ventilator(feedEnd time.Time, gasTimes []time.Time) []time.Time {
	st := g.st
	lateIdx := -1
	var lateAt time.Time
	if st.lateVentGas >= 0 {
		gt := gasTimes[st.lateVentGas]
		first := g.o.Start.Add(time.Minute + time.Duration(st.bed)*4*time.Second)
		lateIdx = int(gt.Sub(first) / g.o.VentEvery)
		lateAt = gt.Add(10*time.Minute + 5*time.Minute)
	}
	var times []time.Time
	for m := 0; ; m++ {
		eff := g.o.Start.Add(time.Minute + time.Duration(st.bed)*4*time.Second + time.Duration(m)*g.o.VentEvery)
		at := eff.Add(2 * time.Second) // gateway latency
		if !at.Before(g.end()) || eff.After(feedEnd) {
			return times
		}
		if m == lateIdx {
			at = lateAt
		}
		times = append(times, eff)
		g.ventReading(m, eff, at, st.at(g.frac(eff)))
	}
}

// ventReading sends one reading in the bed's feed shape.
func (g *generator) ventReading(m int, eff, at time.Time, s state) {
	st := g.st
	r := g.rng
	pick := func(mdc, loinc code) []code {
		switch st.vent {
		case ventTxMDC:
			return []code{mdc}
		case ventTxBoth:
			return []code{mdc, loinc}
		}
		return []code{loinc}
	}
	rrUnit := unitPerMin
	if st.vent == ventTxMDC || st.vent == ventTxBoth {
		rrUnit = unitBreaths
	}

	ve := s.ve() * (1 + 0.025*r.NormFloat64())
	vt := s.vt * (1 + 0.03*r.NormFloat64())
	// Measured total rate averaged over the minute: on controlled ventilation
	// it stays within a few tenths of the set rate [common practice].
	rr := s.rr + 0.3*r.NormFloat64()
	// End-tidal gas is in equilibrium with blood at body temperature.
	etco2 := s.paCO2AtBody() - s.gap + 0.7*r.NormFloat64()
	rs := []reading{
		{"ve", []code{loincVEexp}, qty(ve, 2, unitLMin)},
		{"vt", pick(mdcVT, loincVT), qty(vt, 0, unitML)},
		{"rr", pick(mdcRRtotal, loincRRtotal), qty(rr, 1, rrUnit)},
	}
	if st.etco2KPa {
		rs = append(rs, reading{"etco2", pick(mdcETCO2, loincPETCO2), qty(etco2/mmHgPerKPa, 2, unitKPa)})
	} else {
		rs = append(rs, reading{"etco2", pick(mdcETCO2, loincPETCO2), qty(etco2, 1, unitMmHg)})
	}
	fio2 := s.fio2 + 0.005*r.NormFloat64()
	switch {
	case st.fio2Fraction:
		rs = append(rs, reading{"fio2", []code{loincFiO2}, qty(fio2, 2, unitOne)})
	case st.vent == ventTxMDC || st.vent == ventTxBoth:
		rs = append(rs, reading{"fio2", []code{loincFiO2Vent}, qty(fio2*100, 0, unitPercent)})
	default:
		rs = append(rs, reading{"fio2", []code{loincFiO2}, qty(fio2*100, 0, unitPercent)})
	}
	rs = append(rs, reading{"peep", pick(mdcPEEP, loincPEEP), qty(s.peep+0.2*r.NormFloat64(), 1, unitCmH2O)})
	if st.vent == ventTxMDC || st.vent == ventTxBoth {
		// Ventilators report inspired volume too; it runs a little above
		// expired (circuit compression and leak) and must not be preferred.
		rs = append(rs, reading{"vei", pick(mdcVEinsp, loincVEinsp), qty(ve*1.04, 2, unitLMin)})
	}
	if st.vco2Measured {
		rs = append(rs, reading{"vco2", []code{loincVCO2}, qty(s.vco2*(1+0.03*r.NormFloat64()), 0, unitMLMin)})
	}
	// Plateau pressure needs an inspiratory hold: every 30th reading.
	if s.plateau > 0 && m%30 == 0 {
		rs = append(rs, reading{"pplat", pick(mdcPlateau, loincPlateau), qty(s.plateau+0.3*r.NormFloat64(), 0, unitCmH2O)})
	}

	obs := make([]jsonObservation, len(rs))
	for i, x := range rs {
		obs[i] = jsonObservation{
			// Device gateways send no category and no encounter: they know
			// the bed's patient, not the visit.
			ResourceType: "Observation", ID: fmt.Sprintf("lg-%04d-v%06d-%s", st.bed, m, x.suffix), Status: "final",
			Code: concept(x.codes...), Subject: &jsonRef{Reference: g.ref},
			EffectiveDateTime: fhirTime(eff), ValueQuantity: x.q,
			Device: &jsonRef{Reference: fmt.Sprintf("Device/lg-vent-%02d", st.bed)},
		}
	}
	if st.vent == ventSingles {
		for _, o := range obs {
			g.emit(at, SubjectDevice, mustJSON(o))
		}
		return
	}
	payload := transaction(fmt.Sprintf("lg-%04d-v%06d", st.bed, m), at, obs)
	if st.malformed == malformedJSON && m == g.malformedReading() {
		// The gateway's connection dropped mid-message: the reading arrives cut.
		g.emitBad(at, SubjectDevice, payload[:len(payload)/2], DeadLetterInvalidJSON)
		return
	}
	g.emit(at, SubjectDevice, payload)
}

// malformedReading is the index of the reading a malformedJSON bed sends cut
// short: about a third into the span.
func (g *generator) malformedReading() int {
	return int(g.o.Duration / 3 / g.o.VentEvery)
}

func transaction(id string, at time.Time, obs []jsonObservation) []byte {
	b := jsonBundle{ResourceType: "Bundle", ID: id, Type: "transaction", Timestamp: fhirTime(at)}
	for _, o := range obs {
		b.Entry = append(b.Entry, jsonEntry{
			FullURL: fhirBase + "Observation/" + o.ID, Resource: mustJSON(o),
			Request: &jsonRequest{Method: "PUT", URL: "Observation/" + o.ID},
		})
	}
	return mustJSON(b)
}

func message(id string, at time.Time, obs []jsonObservation) []byte {
	h := jsonMessageHeader{
		ResourceType: "MessageHeader", ID: id + "-header",
		EventCoding: jsonCoding{System: systemMsgEvent, Code: "observation-result", Display: "Observation result"},
		Source:      jsonMessageSource{Name: "Larkspur laboratory system", Endpoint: "https://lis.larkspur.example/fhir"},
	}
	for _, o := range obs {
		h.Focus = append(h.Focus, jsonRef{Reference: "Observation/" + o.ID})
	}
	b := jsonBundle{ResourceType: "Bundle", ID: id, Type: "message", Timestamp: fhirTime(at)}
	b.Entry = append(b.Entry, jsonEntry{FullURL: fhirBase + "MessageHeader/" + h.ID, Resource: mustJSON(h)})
	for _, o := range obs {
		b.Entry = append(b.Entry, jsonEntry{FullURL: fhirBase + "Observation/" + o.ID, Resource: mustJSON(o)})
	}
	return mustJSON(b)
}

// draw measures a blood gas at t: the story's state plus analyser noise.
func (g *generator) draw(k int, t time.Time) gas {
	s := g.st.at(g.frac(t))
	r := g.rng
	d := gas{k: k, effective: t, st: s}
	d.paCO2 = s.paCO2() + 0.6*r.NormFloat64()
	if g.st.venous {
		// Central venous PCO2 runs about 5 mm[Hg] above arterial [common practice].
		d.paCO2 += 5
	}
	d.hco3 = s.hco3 + 0.4*r.NormFloat64()
	d.paO2 = s.pf*s.fio2 + 3*r.NormFloat64()
	d.pH = 6.1 + math.Log10(d.hco3/(0.0307*d.paCO2)) // Henderson-Hasselbalch [common practice]
	d.be = 0.93 * (d.hco3 - 24.4 + 14.8*(d.pH-7.4))  // Van Slyke, as analysers report it [memory]
	return d
}

// labReport sends a blood-gas report in the bed's laboratory shape, and its
// later version when the story amends it or enters it in error.
func (g *generator) labReport(d gas) {
	st := g.st
	at := d.effective.Add(10 * time.Minute)
	switch d.k {
	case st.amendGas:
		wrong := d
		wrong.paCO2 += 15 // first reported wrong, amended an hour later
		wrong.pH = 6.1 + math.Log10(wrong.hco3/(0.0307*wrong.paCO2))
		g.labMessage(wrong, at, "1", "final")
		g.labMessage(d, d.effective.Add(70*time.Minute), "2", "amended")
	case st.errorGas:
		// Another patient's sample: values unlike this patient's story.
		other := d
		other.paCO2, other.pH, other.hco3, other.paO2 = 68, 7.21, 26.5, 61
		other.be = 0.93 * (other.hco3 - 24.4 + 14.8*(other.pH-7.4))
		g.labMessage(other, at, "1", "final")
		g.labMessage(other, d.effective.Add(100*time.Minute), "2", "entered-in-error")
	default:
		g.labMessage(d, at, "1", "final")
	}
}

func (g *generator) labMessage(d gas, at time.Time, version, status string) {
	st := g.st
	id := fmt.Sprintf("lg-%04d-abg-%02d", st.bed, d.k)
	if st.venous {
		id = fmt.Sprintf("lg-%04d-vbg-%02d", st.bed, d.k)
	}
	meta := &jsonMeta{VersionID: version, LastUpdated: fhirTime(at)}
	base := func(sfx string, c code, q *jsonQuantity) jsonObservation {
		oid := id
		if sfx != "" {
			oid += "-" + sfx
		}
		return jsonObservation{
			ResourceType: "Observation", ID: oid, Meta: meta, Status: status,
			Category: []jsonConcept{concept(categoryLab)}, Code: concept(c),
			Subject: &jsonRef{Reference: g.ref}, Encounter: &jsonRef{Reference: g.enc},
			EffectiveDateTime: fhirTime(d.effective), Issued: fhirTime(at.Add(-2 * time.Minute)), ValueQuantity: q,
		}
	}
	pressure := func(mmHg float64) *jsonQuantity {
		if st.labKPa {
			return qty(mmHg/mmHgPerKPa, 2, unitKPa)
		}
		return qty(mmHg, 1, unitMmHg)
	}
	if st.venous {
		g.emit(at, SubjectLab, mustJSON(base("pco2", loincPvCO2, pressure(d.paCO2))))
		return
	}
	singles := []jsonObservation{
		base("pco2", loincPaCO2, pressure(d.paCO2)),
		base("po2", loincPaO2, pressure(d.paO2)),
		base("ph", loincPH, qty(d.pH, 2, unitPH)),
		base("hco3", loincHCO3, qty(d.hco3, 1, unitMmolL)),
		base("be", loincBE, qty(d.be, 1, unitMmolL)),
	}
	panel := base("", loincABGPanel, nil)
	switch st.lab {
	case labSingles:
		for _, o := range singles {
			g.emit(at, SubjectLab, mustJSON(o))
		}
	case labComponents, labMessagePanel:
		for _, o := range singles {
			panel.Component = append(panel.Component, jsonComponent{Code: o.Code, ValueQuantity: o.ValueQuantity})
		}
		if st.lab == labComponents {
			g.emit(at, SubjectLab, mustJSON(panel))
		} else {
			g.emit(at, SubjectLab, message(id+"-msg-v"+version, at, []jsonObservation{panel}))
		}
	case labHasMemberTx:
		for _, o := range singles {
			panel.HasMember = append(panel.HasMember, jsonRef{Reference: "Observation/" + o.ID})
		}
		g.emit(at, SubjectLab, transaction(id+"-tx-v"+version, at, append([]jsonObservation{panel}, singles...)))
	case labMessageSingles:
		g.emit(at, SubjectLab, message(id+"-msg-v"+version, at, singles))
	case labTxSingles:
		g.emit(at, SubjectLab, transaction(id+"-tx-v"+version, at, singles))
	}
}

// malformed sends the bed's malformed laboratory or device message (the cut
// ventilator reading is sent by ventReading), near the first blood gas.
func (g *generator) malformed(gasTimes []time.Time) {
	st := g.st
	at := gasTimes[0].Add(25 * time.Minute)
	eff := fhirTime(gasTimes[0].Add(5 * time.Minute))
	switch st.malformed {
	case malformedResourceType:
		// An infusion record routed to the laboratory subject.
		g.emitBad(at, SubjectLab, fmt.Appendf(nil,
			`{"resourceType":"MedicationAdministration","id":"lg-%04d-medadmin-01","status":"completed",`+
				`"medicationCodeableConcept":{"text":"noradrenaline infusion"},"subject":{"reference":%q},`+
				`"effectiveDateTime":%q}`, st.bed, g.ref, eff), DeadLetterResourceType)
	case malformedNoSubject:
		// The gateway lost the bed-to-patient association.
		o := jsonObservation{
			ResourceType: "Observation", ID: fmt.Sprintf("lg-%04d-unassoc-01-etco2", st.bed), Status: "final",
			Code: concept(mdcETCO2, loincPETCO2), EffectiveDateTime: eff, ValueQuantity: qty(36.0, 1, unitMmHg),
		}
		g.emitBad(at, SubjectDevice, mustJSON(o), DeadLetterNoSubject)
	case malformedUnit:
		// A point-of-care analyser sends a unit that is not UCUM ("cm[Hg]" would be).
		o := jsonObservation{
			ResourceType: "Observation", ID: fmt.Sprintf("lg-%04d-poc-01-pco2", st.bed), Meta: &jsonMeta{VersionID: "1"},
			Status: "final", Category: []jsonConcept{concept(categoryLab)}, Code: concept(loincPaCO2),
			Subject: &jsonRef{Reference: g.ref}, Encounter: &jsonRef{Reference: g.enc}, EffectiveDateTime: eff,
			ValueQuantity: &jsonQuantity{Value: 5.6, Unit: "cmHg", System: systemUCUM, Code: "cmHg"},
		}
		g.emitBad(at, SubjectLab, mustJSON(o), DeadLetterUnknownUnit)
	}
}
