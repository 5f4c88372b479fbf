package scenario

import "math"

// kAlveolar is the constant of the alveolar ventilation equation at body
// temperature T (Cel), mm[Hg] L / mL: 0.760 x (273 + T) / 273, 0.863 at 37
// Cel (reference/physiology.md section 1, STPD to BTPS).
func kAlveolar(tempC float64) float64 { return 0.760 * (273 + tempC) / 273 }

// pco2To37 turns a blood PCO2 at body temperature T into the value a
// blood-gas analyser reports at 37 Cel: x 10^(0.019 x (37 - T)) (in vitro
// coefficient of fresh human blood, J Appl Physiol, submitted 1964
// [published]; the service's physio.PCO2TempCoefficient).
func pco2To37(pco2, tempC float64) float64 { return pco2 * math.Pow(10, 0.019*(37-tempC)) }

// anatomicPerKg is the anatomic dead space of an intubated or
// tracheostomised adult per kg of predicted body weight: the intrathoracic
// airway, 0.43 mL per lb (Nunn, Campbell & Peckett, J Appl Physiol
// 1959;14:174-6 [published]). Every bed of the unit has an artificial
// airway, so the service's default model fits them.
const anatomicPerKg = 0.43 / 0.45359237

// minAlveolarFraction is the least alveolar part of the physiologic dead
// space a story may have, as a fraction of VT: physiologic dead space is
// anatomic plus apparatus plus alveolar [published: Enghoff; reference
// physiology.md s2 and s7], and with a margin of 0.05 of VT the noise of the
// readings (VCO2 4 %, VT 3 %, rate 0.6 /min) does not make a measured PaCO2
// look materially below the predicted one.
const minAlveolarFraction = 0.05

// state is a patient's true physiology at one moment. Measured values are
// made from it with noise.
type state struct {
	vco2    float64 // CO2 production, mL/min STPD
	vdvt    float64 // physiologic dead-space fraction (Enghoff), 1
	vt      float64 // expired tidal volume, mL
	rr      float64 // total breath rate, /min
	gap     float64 // arterial to end-tidal CO2 gradient, mm[Hg]
	hco3    float64 // plasma bicarbonate, mmol/L
	pf      float64 // PaO2/FiO2, mm[Hg]
	fio2    float64 // inspired O2 fraction, 1
	peep    float64 // cm[H2O]
	plateau float64 // cm[H2O]; 0: the ventilator reports none
	tempC   float64 // body temperature, Cel
}

// ve is the expired minute volume, L/min.
func (s state) ve() float64 { return s.vt * s.rr / 1000 }

// paCO2AtBody is the arterial CO2 tension in the patient, at body
// temperature, that the alveolar ventilation equation gives for this state,
// mm[Hg] (reference/physiology.md sections 1 and 2).
func (s state) paCO2AtBody() float64 { return kAlveolar(s.tempC) * s.vco2 / (s.ve() * (1 - s.vdvt)) }

// paCO2 is the arterial CO2 tension as the analyser reports it, at 37 Cel.
func (s state) paCO2() float64 { return pco2To37(s.paCO2AtBody(), s.tempC) }

// pbwKg is the ARDS Network predicted body weight of a story's patient, kg
// [published: NEJM 2000;342:1301-8].
func (st story) pbwKg() float64 {
	if st.gender == "female" {
		return 45.5 + 0.91*(st.heightCm-152.4)
	}
	return 50 + 0.91*(st.heightCm-152.4)
}

// serialDeadSpaceML is the anatomic plus apparatus dead space of a story's
// patient, mL: the least physiologic dead space possible.
func (st story) serialDeadSpaceML() float64 { return anatomicPerKg*st.pbwKg() + ApparatusDeadSpaceML }

// How a feed shapes its messages.
type labShape int

const (
	labSingles        labShape = iota // one Observation per message
	labComponents                     // one 24336-0 panel with components
	labHasMemberTx                    // transaction Bundle: 24336-0 panel with hasMember, and the members
	labMessageSingles                 // message Bundle: MessageHeader and single Observations
	labMessagePanel                   // message Bundle: MessageHeader and a panel with components
	labTxSingles                      // transaction Bundle of single Observations
)

type ventShape int

const (
	ventSingles ventShape = iota // one Observation per message, LOINC
	ventTxLOINC                  // one transaction Bundle per reading, LOINC
	ventTxMDC                    // transaction Bundle, MDC codes (LOINC where MDC has none)
	ventTxBoth                   // transaction Bundle, MDC and LOINC codings together
)

type malformedKind int

const (
	wellFormed malformedKind = iota
	malformedJSON
	malformedResourceType
	malformedNoSubject
	malformedUnit
)

// story is one bed: who the patient is, how their physiology runs through the
// day, and how the hospital's feeds send it.
type story struct {
	bed          int
	label        string
	text         string
	gender       string
	birthDate    string
	heightCm     float64
	weightKg     float64
	imperialBody bool // height in [in_i], weight in [lb_av]

	// at gives the state at fraction f of the simulated span (0..1).
	at func(f float64) state

	lab          labShape
	labKPa       bool
	venous       bool // blood gases are venous (2021-4) only
	vent         ventShape
	etco2KPa     bool
	fio2Fraction bool // FiO2 as a fraction with unit "1", else %
	vco2Measured bool
	tempF        bool
	coreTemp     bool // body temperature from an oesophageal probe (core)

	feedStops   bool // the ventilator feed stops after the middle blood gas
	amendGas    int  // index of a blood gas later amended; -1: none
	errorGas    int  // index of a blood gas later entered in error; -1: none
	lateVentGas int  // index of a blood gas whose nearest reading arrives late; -1: none
	malformed   malformedKind

	// ranges are the ranges the service's current derived values must lie
	// in for this story (Expectation.Ranges): the story's values, computed
	// from its model, widened by the noise of the readings.
	ranges []ValueRange
}

// Kinds of the service's catalogue (fhirmap.Catalogue codes) that stories
// state ranges for.
const (
	KindDeadSpaceVCO2    = "deadspace-fraction-vco2"
	KindVentilatoryRatio = "ventilatory-ratio"
	KindGradient         = "paco2-petco2-gradient"
	KindDiscrepancy      = "paco2-measured-minus-predicted"
)

// DiscrepancyFloor is the least measured-minus-predicted PaCO2, mm[Hg], a
// story without an input error may show: below -5 mm[Hg] the service calls
// the value physiologically implausible (physio.DiscrepancyThreshold).
const DiscrepancyFloor = -5

// ValueRange is the range, in the kind's unit (VD/VT and ratios 1, PaCO2
// differences mm[Hg]), in which every current derived value of Kind of a
// patient must lie.
type ValueRange struct {
	Kind     string
	Min, Max float64
}

// rangesOf builds a story's ranges: VD/VT, ventilatory ratio, gradient and
// (when VCO2 is measured) measured minus predicted PaCO2, each as min..max.
func rangesOf(vdvt, vr, gradient, discrepancy [2]float64) []ValueRange {
	var rs []ValueRange
	for _, r := range []struct {
		kind string
		v    [2]float64
	}{{KindDeadSpaceVCO2, vdvt}, {KindVentilatoryRatio, vr}, {KindGradient, gradient}, {KindDiscrepancy, discrepancy}} {
		if r.v != [2]float64{} {
			rs = append(rs, ValueRange{Kind: r.kind, Min: r.v[0], Max: r.v[1]})
		}
	}
	return rs
}

// none marks a kind a story states no range for (not derived).
var none = [2]float64{}

func lerp(a, b, f float64) float64 { return a + (b-a)*f }

// ramp is a until f0, b from f1, linear in between.
func ramp(a, b, f, f0, f1 float64) float64 {
	switch {
	case f <= f0:
		return a
	case f >= f1:
		return b
	}
	return lerp(a, b, (f-f0)/(f1-f0))
}

// stories are the ten beds of ICU 3 West. Values are chosen from the story
// and the published ranges in reference/physiology.md; PaCO2 follows from
// them (see the package comment), it is never chosen directly.
func stories() []story {
	return []story{
		{
			bed: 1, label: "Bed 1: normal lungs after abdominal surgery",
			text: "Healthy lungs ventilated overnight after surgery. Expect VD/VT about 0.32 (normal about 0.3, " +
				"Nunn & Hill 1960), ventilatory ratio about 0.9, arterial to end-tidal gradient about 4-5 mmHg, " +
				"measured PaCO2 about 5 mmHg above predicted (the small alveolar dead space of healthy ventilated lungs). One " +
				"ventilator reading arrives after the second blood gas.",
			gender: "male", birthDate: "1961-05-14", heightCm: 178, weightKg: 82,
			at: func(f float64) state {
				return state{vco2: 200, vdvt: 0.32, vt: 560, rr: 12, gap: 4.5, hco3: 24, pf: 420, fio2: 0.35, peep: 5, tempC: 36.8}
			},
			lab: labSingles, vent: ventSingles, vco2Measured: true,
			amendGas: -1, errorGas: -1, lateVentGas: 1,
			ranges: rangesOf([2]float64{0.22, 0.42}, [2]float64{0.76, 1.07}, [2]float64{1, 8}, [2]float64{-5, 14}),
		},
		{
			bed: 2, label: "Bed 2: worsening ARDS",
			text: "Pneumonia progressing to ARDS. Dead space rises through the day (VD/VT 0.55 to 0.70; ARDS onset " +
				"0.58 +/- 0.09, Nuckton 2002) and the ventilatory ratio rises from about 1.5 to above 2 although " +
				"the rate is increased; PaO2/FiO2 falls. Blood gases in kPa as panels with components.",
			gender: "male", birthDate: "1969-09-02", heightCm: 180, weightKg: 88,
			at: func(f float64) state {
				return state{vco2: 220, vdvt: lerp(0.55, 0.70, f), vt: 450, rr: lerp(22, 31, f), gap: lerp(8, 12, f),
					hco3: 25, pf: lerp(160, 95, f), fio2: lerp(0.55, 0.80, f), peep: lerp(12, 15, f),
					plateau: lerp(26, 31, f), tempC: 37.6}
			},
			lab: labComponents, labKPa: true, vent: ventTxBoth, vco2Measured: true,
			amendGas: -1, errorGas: -1, lateVentGas: -1, malformed: malformedJSON,
			ranges: rangesOf([2]float64{0.45, 0.80}, [2]float64{1.27, 2.59}, [2]float64{4.5, 15.5}, [2]float64{7, 35}),
		},
		{
			bed: 3, label: "Bed 3: exacerbation of obstructive lung disease",
			text: "Chronic hypercapnia with metabolic compensation (HCO3 34 mmol/L). High PaCO2 (about 57 mmHg) " +
				"and a wide arterial to end-tidal gradient (about 14 mmHg); VD/VT about 0.6. The rate is raised " +
				"mid-morning and PaCO2 falls as the alveolar ventilation equation predicts. VCO2 is not measured: " +
				"dead space can only be estimated.",
			gender: "male", birthDate: "1957-11-23", heightCm: 170, weightKg: 61,
			at: func(f float64) state {
				return state{vco2: 175, vdvt: 0.60, vt: 470, rr: ramp(14, 16, f, 0.35, 0.40), gap: 14, hco3: 34,
					pf: 230, fio2: 0.30, peep: 5, tempC: 36.9}
			},
			lab: labHasMemberTx, vent: ventTxLOINC, fio2Fraction: true,
			amendGas: -1, errorGas: -1, lateVentGas: -1, malformed: malformedUnit,
			ranges: rangesOf(none, [2]float64{1.29, 1.75}, [2]float64{10.5, 17.5}, none),
		},
		{
			bed: 4, label: "Bed 4: pulmonary embolism, thrombolysed",
			text: "Massive pulmonary embolism: a wide arterial to end-tidal gap (about 17 mmHg, alveolar dead-space " +
				"fraction about 0.45) that narrows to about 7 mmHg after thrombolysis mid-morning, with VD/VT " +
				"falling from 0.55 to 0.40. End-tidal CO2 in kPa, ventilator codes MDC only, body height and " +
				"weight in inches and pounds.",
			gender: "female", birthDate: "1971-02-08", heightCm: 165, weightKg: 80, imperialBody: true,
			at: func(f float64) state {
				return state{vco2: 210, vdvt: ramp(0.55, 0.40, f, 0.40, 0.60), vt: 420, rr: ramp(24, 20, f, 0.40, 0.60),
					gap: ramp(17, 7, f, 0.40, 0.60), hco3: 22, pf: ramp(180, 280, f, 0.40, 0.60),
					fio2: ramp(0.50, 0.35, f, 0.40, 0.60), peep: 8, tempC: 37.2}
			},
			lab: labMessageSingles, vent: ventTxMDC, etco2KPa: true, vco2Measured: true,
			amendGas: -1, errorGas: -1, lateVentGas: -1,
			ranges: rangesOf([2]float64{0.30, 0.65}, [2]float64{1.2, 2.17}, [2]float64{3.5, 20.5}, [2]float64{-1.8, 24.9}),
		},
		{
			bed: 5, label: "Bed 5: septic shock, high CO2 production",
			text: "Fever and sepsis raise CO2 production to about 300 mL/min. The ventilatory ratio is about 2 " +
				"although VD/VT is only about 0.40: the high VE is driven by VCO2, not by dead space. Metabolic " +
				"acidosis improving with resuscitation. Temperature in Fahrenheit.",
			gender: "female", birthDate: "1964-07-30", heightCm: 165, weightKg: 70,
			at: func(f float64) state {
				return state{vco2: lerp(310, 280, f), vdvt: 0.40, vt: 420, rr: 28, gap: 6, hco3: lerp(16, 19, f),
					pf: 250, fio2: 0.40, peep: 8, tempC: lerp(39.2, 38.4, f)}
			},
			lab: labComponents, vent: ventTxLOINC, vco2Measured: true, tempF: true,
			amendGas: -1, errorGas: -1, lateVentGas: -1, malformed: malformedResourceType,
			ranges: rangesOf([2]float64{0.30, 0.50}, [2]float64{1.61, 2.42}, [2]float64{2.5, 9.5}, [2]float64{-2.4, 16}),
		},
		{
			bed: 6, label: "Bed 6: cooled after cardiac arrest",
			text: "Targeted temperature management at 33.5 °C (oesophageal probe) lowers CO2 production to about " +
				"140 mL/min; PaCO2 about 42 mmHg as the analyser reports it at 37 °C (about 36 mmHg at 33.5 °C) on " +
				"a low minute volume. On rewarming VCO2 rises to about 185 mL/min and PaCO2 rises until the rate is " +
				"increased; the ventilation needed for a target PaCO2 of 40 rises with it. VD/VT about 0.36 at " +
				"body temperature, measured PaCO2 about 6-7 mmHg above predicted.",
			gender: "male", birthDate: "1968-12-11", heightCm: 182, weightKg: 85,
			at: func(f float64) state {
				t := ramp(33.5, 36.8, f, 0.55, 0.85)
				return state{vco2: ramp(140, 185, f, 0.55, 0.85), vdvt: 0.36, vt: 520, rr: ramp(10, 12, f, 0.70, 0.72),
					gap: 5, hco3: 22, pf: 300, fio2: 0.40, peep: 6, tempC: t}
			},
			lab: labSingles, vent: ventTxBoth, vco2Measured: true, coreTemp: true,
			amendGas: -1, errorGas: -1, lateVentGas: -1, malformed: malformedNoSubject,
			ranges: rangesOf([2]float64{0.26, 0.46}, [2]float64{0.55, 0.99}, [2]float64{1.5, 8.5}, [2]float64{-3.4, 15.7}),
		},
		{
			bed: 7, label: "Bed 7: venous gases only",
			text: "Only central venous blood gases are drawn (LOINC 2021-4). Every dead-space derivation must be " +
				"refused: venous specimen.",
			gender: "male", birthDate: "1980-04-19", heightCm: 175, weightKg: 78,
			at: func(f float64) state {
				return state{vco2: 210, vdvt: 0.35, vt: 500, rr: 15, gap: 5, hco3: 24, pf: 330, fio2: 0.35, peep: 5, tempC: 37.0}
			},
			lab: labSingles, venous: true, vent: ventTxLOINC, vco2Measured: true,
			amendGas: -1, errorGas: -1, lateVentGas: -1,
		},
		{
			bed: 8, label: "Bed 8: ventilator feed stops",
			text: "Pneumonia with moderate dead space (VD/VT about 0.45). The ventilator's data feed stops after the " +
				"middle blood gas of the day; later blood gases must be refused: no ventilator data in window. " +
				"Blood gases in kPa, FiO2 as a fraction.",
			gender: "female", birthDate: "1955-10-03", heightCm: 158, weightKg: 62,
			at: func(f float64) state {
				return state{vco2: 190, vdvt: 0.45, vt: 400, rr: 20, gap: 7, hco3: 23, pf: 200, fio2: 0.45, peep: 8, tempC: 37.4}
			},
			lab: labMessageSingles, labKPa: true, vent: ventTxLOINC, fio2Fraction: true, feedStops: true,
			amendGas: -1, errorGas: -1, lateVentGas: -1,
			ranges: rangesOf(none, [2]float64{1.33, 1.81}, [2]float64{3.5, 10.5}, none),
		},
		{
			bed: 9, label: "Bed 9: blood gas amended",
			text: "Lung contusion after trauma, VD/VT about 0.40. The laboratory first reports the second blood gas " +
				"with a PaCO2 about 15 mmHg too high, then amends it an hour later: the derived values get a new " +
				"version from the amended value.",
			gender: "male", birthDate: "1989-06-27", heightCm: 188, weightKg: 95,
			at: func(f float64) state {
				return state{vco2: 230, vdvt: 0.40, vt: 560, rr: 16, gap: 5, hco3: 24, pf: 280, fio2: 0.40, peep: 8, tempC: 37.1}
			},
			lab: labMessagePanel, vent: ventTxMDC,
			amendGas: 1, errorGas: -1, lateVentGas: -1,
			ranges: rangesOf(none, [2]float64{0.91, 1.23}, [2]float64{0.5, 9}, none),
		},
		{
			bed: 10, label: "Bed 10: blood gas entered in error",
			text: "Aspiration pneumonia, VD/VT about 0.45. The second blood gas came from another patient's sample " +
				"(PaCO2 about 68 mmHg) and is marked entered-in-error 100 minutes later: its derived values are " +
				"retracted.",
			gender: "female", birthDate: "1976-01-15", heightCm: 170, weightKg: 68,
			at: func(f float64) state {
				return state{vco2: 200, vdvt: 0.45, vt: 430, rr: 18, gap: 6, hco3: 24, pf: 240, fio2: 0.40, peep: 8, tempC: 37.3}
			},
			lab: labTxSingles, vent: ventTxLOINC, vco2Measured: true,
			amendGas: -1, errorGas: 1, lateVentGas: -1,
			ranges: rangesOf([2]float64{0.35, 0.55}, [2]float64{1.16, 1.56}, [2]float64{2.5, 9.5}, [2]float64{1.6, 19.6}),
		},
	}
}
