package fhirmap

import (
	"time"

	"github.com/ventderive/ventderive/physio"
)

// Quantity names a physiological quantity the service understands. Every
// Fact of one Quantity carries its value in that Quantity's canonical UCUM
// unit (see Quantity.Unit), whatever unit the sender used.
type Quantity string

// The quantities read from input. Canonical units are UCUM codes.
const (
	QPCO2        Quantity = "pco2"          // mm[Hg]; blood CO2 tension, the specimen says which blood
	QPO2         Quantity = "po2"           // mm[Hg]; blood O2 tension
	QPH          Quantity = "ph"            // [pH]
	QBicarbonate Quantity = "hco3"          // mmol/L
	QBaseExcess  Quantity = "base-excess"   // mmol/L
	QPETCO2      Quantity = "petco2"        // mm[Hg]; end-tidal CO2 partial pressure
	QVCO2        Quantity = "vco2"          // mL/min; CO2 production, measured
	QMinuteVol   Quantity = "minute-volume" // L/min; Origin and Detail say expired, inspired or set
	QTidalVol    Quantity = "tidal-volume"  // mL
	QRespRate    Quantity = "resp-rate"     // /min
	QFiO2        Quantity = "fio2"          // 1 (a fraction 0.21..1)
	QPEEP        Quantity = "peep"          // cm[H2O]
	QPlateau     Quantity = "plateau"       // cm[H2O]
	QMeanAirway  Quantity = "mean-airway"   // cm[H2O]
	QPFRatio     Quantity = "pf-ratio"      // mm[Hg]
	QWeight      Quantity = "body-weight"   // kg
	QHeight      Quantity = "body-height"   // cm
	QBodyTemp    Quantity = "body-temp"     // Cel
	QSex         Quantity = "sex"           // coded: Fact.Text is "male" or "female" (FHIR administrative-gender)
	QBirthDate   Quantity = "birth-date"    // Fact.Text is the FHIR date as sent (YYYY, YYYY-MM or YYYY-MM-DD)
	QPECO2       Quantity = "peco2"         // mm[Hg]; mixed-expired CO2 partial pressure (volumetric capnography, site alias only)
	QFETCO2      Quantity = "fetco2"        // 1; end-tidal CO2 as a volume fraction (LOINC 19889-5), not a pressure
	// QTargetPaCO2 is a patient's own target PaCO2, read from a FHIR Goal
	// (never from an Observation): Value is the target in mm[Hg] (for a
	// goal range its midpoint), Text "<low>..<high>" in mm[Hg] for a range
	// and "" for a single value, Effective the Goal's startDate (zero when
	// it has none).
	QTargetPaCO2 Quantity = "target-paco2"
	// QApparatusVD is the apparatus dead space of the patient's circuit
	// (HME, closed suction, extensions beyond the Y-piece), in mL, from an
	// Observation with a site alias code (no LOINC code exists for it).
	QApparatusVD Quantity = "apparatus-dead-space"
	// QAirway is the patient's airway, which decides the anatomic dead
	// space model of predicted PaCO2: Text is a physio.AnatomicModel name,
	// "artificial-airway" (a tracheal tube or tracheostomy) or
	// "whole-airway" (no artificial airway: mask ventilation), read from the
	// valueCodeableConcept of an Observation with a site alias code (see
	// AirwayValue for the value codes).
	QAirway Quantity = "airway"
)

// Origin tells a measured value from a ventilator setting. Measured values
// are preferred; a setting is used only as a recorded fallback.
type Origin string

const (
	OriginMeasured   Origin = "measured"
	OriginSetting    Origin = "setting"
	OriginCalculated Origin = "calculated" // e.g. LOINC 19890-3, PETCO2 by calculation
)

// Specimen is the blood a gas value was measured in. Only arterial blood is
// valid for dead-space work.
type Specimen string

const (
	SpecimenNone        Specimen = ""             // not a blood value
	SpecimenArterial    Specimen = "arterial"     // by code, or by the Observation's specimen
	SpecimenVenous      Specimen = "venous"       // refused for dead space
	SpecimenCapillary   Specimen = "capillary"    // refused for dead space
	SpecimenMixedVenous Specimen = "mixed-venous" // refused for dead space
	SpecimenUnknown     Specimen = "unknown"      // unspecified-specimen code with no arterial specimen: refused
)

// Status is the FHIR Observation.status of an input or output.
type Status string

const (
	StatusRegistered     Status = "registered"
	StatusPreliminary    Status = "preliminary"
	StatusFinal          Status = "final"
	StatusAmended        Status = "amended"
	StatusCorrected      Status = "corrected"
	StatusCancelled      Status = "cancelled"
	StatusEnteredInError Status = "entered-in-error"
	StatusUnknown        Status = "unknown"
)

// Coding is a code as received or emitted.
type Coding struct {
	System  string
	Code    string
	Display string
}

// Fact is one normalised input value: one Observation (or one component of
// a panel, or one attribute of a Patient) reduced to a quantity, a value in
// the quantity's canonical unit, a time and an identity.
type Fact struct {
	// Key is the stable identity of this fact across versions:
	// "Observation/<id>" for a single value, "Observation/<id>#<system>|<code>"
	// for a component, "Patient/<id>#sex" for a patient attribute.
	Key string
	// Resource is the FHIR reference of the resource it came from
	// ("Observation/abg-1"), used in derivedFrom and Provenance.entity.
	Resource string
	// VersionID is meta.versionId, or "" when the sender gave none.
	VersionID string
	// LastUpdated is meta.lastUpdated, zero when absent.
	LastUpdated time.Time
	// Digest is a hex SHA-256 of the resource's JSON as received; with
	// VersionID it decides which version of a Key is current.
	Digest string

	Patient   string // subject reference, "Patient/<id>"; never empty
	Encounter string // encounter reference or ""

	Quantity Quantity
	Origin   Origin
	Detail   string   // e.g. "expired", "inspired", "total", "mechanical", "spontaneous"
	Specimen Specimen // for blood values
	// TempCorrected marks a blood-gas value adjusted to the patient's temperature (LOINC 32771-8).
	TempCorrected bool

	Value float64 // in Quantity.Unit()
	Unit  string  // canonical UCUM unit, equal to Quantity.Unit()
	Text  string  // for coded or date facts (QSex, QBirthDate); the bounds of a goal range (QTargetPaCO2)

	SourceValue float64 // value as received
	SourceUnit  string  // unit as received
	Code        Coding  // the code that identified the quantity

	Status    Status
	Effective time.Time // effective[x] (a period's start), always with a zone, stored as UTC
	Issued    time.Time // Observation.issued, zero when absent
}

// Role names what an input was used for in a derivation.
type Role string

// Input is one fact used (or considered) by a derivation, with its offset
// from the blood gas's effective time (positive: after the blood gas).
type Input struct {
	Role   Role
	Fact   Fact
	Offset time.Duration
	// Fallback says why this input is not the preferred kind ("setting used:
	// no measured expired minute volume in window"); empty when preferred.
	Fallback string
}

// Derivation is one derived value made from one arterial blood gas and the
// data around it. Its identity (Key) is stable across recomputations; its
// content (Digest) changes when its value, inputs or status change.
type Derivation struct {
	Key       string // "<patient>|<blood-gas fact key>|<kind code>"
	ID        string // UUID v5 of Key: the output Observation.id
	Kind      string // code in the service's CodeSystem
	Patient   string
	Encounter string
	Effective time.Time // the blood gas's effective time
	BloodGas  string    // Key of the arterial PaCO2 fact
	Result    physio.Result
	Inputs    []Input
	Status    Status // final, preliminary, amended, corrected, entered-in-error
	Algorithm string // algorithm version of the service, e.g. "ventderive-derive/1"
	Digest    string // hex SHA-256 over kind, value, unit, inputs (keys and digests) and status
	// Retracted is the reason code when Status is entered-in-error: the
	// service withdrew a value it had published (its blood gas was entered in
	// error, or an input it needed was withdrawn). Empty otherwise.
	Retracted string
	// Steps are the intermediate results the value rests on, in order (the
	// predicted body weight inside a ventilatory ratio, the dead-space
	// fraction inside a dead-space volume), each with its own basis, so that
	// the whole chain can be redone by hand. Not part of Digest: they are
	// functions of Inputs.
	Steps []physio.Result
}

// Refusal records that a derivation of Kind was not made for a blood gas,
// and why. Refusals are values: they are stored, counted and reported.
type Refusal struct {
	Key        string // "<patient>|<blood-gas fact key>|<kind code>", same as the Derivation it stands for
	Kind       string
	Patient    string
	BloodGas   string
	Effective  time.Time
	Reason     string // a stable reason code, e.g. "venous-specimen", "no-ventilator-data-in-window"
	Detail     string // human-readable, no patient identifiers
	Considered []Input
	Digest     string // hex SHA-256 over kind, reason and considered inputs
}

// Resource is one FHIR resource of an input message, kept as received for
// the provenance store.
type Resource struct {
	Type      string // "Observation", "Patient", "Goal"
	Reference string // "Observation/<id>"
	VersionID string
	Patient   string // subject reference
	Digest    string // hex SHA-256 of Raw
	Raw       []byte // the resource's JSON as received
}

// Window is the pairing window around an arterial blood gas: ventilator and
// end-tidal data from Before the blood gas to After it are considered.
type Window struct {
	Before time.Duration
	After  time.Duration
}
