// Package scenario generates an invented intensive-care day as FHIR R4 input
// messages: ten ventilated patients of "Larkspur General Hospital", unit
// "ICU 3 West", each with a physiological story a clinician would recognise,
// plus a few malformed messages that must end as dead letters. The demo and
// the simulate command publish it; benchmarks use it as load.
//
// Everything is invented: the hospital, the patients (bed labels only, no
// names), the identifiers and the values. Generate is deterministic for a
// seed: the same Options give byte-identical messages.
//
// # How the numbers are made
//
// Each story fixes, as a function of the time of day, the true CO2
// production VCO2 (mL/min, STPD), the physiologic dead-space fraction VD/VT,
// the tidal volume VT (mL), the breath rate RR (/min) and the body
// temperature T (Cel), so that the expired minute volume is VE = VT x RR /
// 1000 (L/min). The arterial CO2 tension in the patient then follows from the
// alveolar ventilation equation with the Enghoff dead space at body
// temperature (shared reference physiology.md, sections 1 and 2), and the
// analyser reports it at 37 Cel with the in vitro coefficient 0.019 (J Appl
// Physiol, submitted 1964 [published]):
//
//	PaCO2(T) [mm[Hg]] = 0.760 x (273 + T) / 273 x VCO2 / (VE x (1 - VD/VT))
//	PaCO2 reported    = PaCO2(T) x 10^(0.019 x (37 - T))
//
// Every bed is intubated, and each story's VD/VT is at least the anatomic
// dead space of an artificial airway (0.948 mL/kg of predicted body weight,
// Nunn, Campbell & Peckett 1959) plus the apparatus dead space plus 0.05 of
// VT of alveolar dead space (TestStoriesPhysiologicallyConsistent), so that
// the measured PaCO2 is never materially below the predicted one. Each story
// states the ranges its derived values must lie in (Expectation.Ranges).
//
// End-tidal CO2 is PaCO2(T) minus a story-specific arterial to end-tidal
// gradient (normal 4.6 +/- 2.5 mm[Hg], Nunn & Hill 1960). pH follows from
// the Henderson-Hasselbalch equation, pH = 6.1 + log10(HCO3 / (0.0307 x
// PaCO2)) [common practice], and base excess from the Van Slyke form used by
// blood-gas analysers, BE = 0.93 x (HCO3 - 24.4 + 14.8 x (pH - 7.4))
// [memory]. PaO2 is the story's PaO2/FiO2 ratio times FiO2. Measurement
// noise is added on top: analyser noise on blood gases, breath-to-breath
// noise on ventilator readings.
//
// # Assumptions the demo must configure to match
//
//   - Apparatus dead space: ApparatusDeadSpaceML (50 mL, a heat-moisture
//     exchanger and catheter mount) for every bed. The stories' physiologic
//     VD/VT already include it, as the apparatus lies between the Y-piece and
//     the patient.
//   - Pairing window: PairingBefore (30 min) before and PairingAfter (10 min)
//     after a blood gas, the defaults of consumer.DefaultConfig. Expectation
//     counts are computed with this window. Body temperature is paired in
//     the service's own default window (2 h before to 30 min after).
//   - Anatomic dead space: the service's default, artificial airway.
//
// # Feeds and shapes
//
// Blood gases come from the laboratory on SubjectLab as single
// Observations, panels with components (LOINC 24336-0), a panel with
// hasMember inside a transaction Bundle, and message Bundles; in mm[Hg] or
// kPa. Ventilator readings come from the bedside gateway on SubjectDevice
// every VentEvery, as single Observations or one transaction Bundle per
// reading, coded with LOINC, with ISO/IEEE 11073 MDC codes, or with both;
// FiO2 as % and as a fraction (unit "1"). Patient resources (gender,
// birthDate) and body height and weight come from admission on SubjectADT;
// body temperature hourly from the monitor on SubjectDevice. Laboratory
// Observations carry meta.versionId; a new version (amended,
// entered-in-error) carries the next one.
package scenario
