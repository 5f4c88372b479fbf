// Package fhirmap is the FHIR R4 edge of the service: it reads blood gas,
// ventilator and patient resources into Facts, pairs them, derives values
// through package physio, and writes advisory FHIR Observations,
// Provenance and the service's CodeSystem. It does no I/O.
//
// # Input: strict decoding
//
// Decode reads one message (an Observation, a Patient, a Goal, or a Bundle
// of type transaction, batch, collection or message holding them); DecodeFile reads
// a JSON or NDJSON file. Decoding is built on the FHIR model structs of
// github.com/samply/golang-fhir-models, which accept too much, so a strict
// pass over the bytes runs first (decode_strict.go). A message is taken
// whole or refused whole with a *DecodeError whose Reason is a stable code
// (see DecodeError) and whose Field names the element, e.g.
// "Bundle.entry[3].resource.valueQuantity.unit"; nothing partial is ever
// returned with an error, and no error text carries a patient value or
// identifier.
//
// Refused: malformed JSON, null, a JSON type the element cannot hold, an
// unknown or misspelled field at any depth, a key given twice, two
// variants of one choice element (valueQuantity and valueString), a
// primitive extension ("_status"), a modifierExtension, a missing status,
// code, subject, effective time or id, a wrong resourceType, a Bundle
// type other than the four above, a message Bundle not starting with a
// MessageHeader, an unknown unit (named, never guessed), a value that is
// not finite, negative where impossible, or a FiO2 that stays ambiguous, a
// time without a zone, an unresolvable reference, more than 1 MiB, more
// than 1000 entries, and empty input.
//
// Kept and read where FHIR allows it: a contained Specimen referenced by
// "#id", and Specimen entries of the same Bundle (they may say the blood is
// arterial). Tolerated and listed in Decoded.Ignored with a reason, never
// dropped silently: other resource types in a Bundle (MessageHeader,
// Device, Encounter, Specimen, ...), Observations and components whose code
// is not in the code table, dataAbsentReason, values with a comparator,
// panels without values of their own, transaction entries without a
// resource (DELETE).
//
// Identity. An Observation's Resource is "Observation/<id>"; in a Bundle an
// Observation without id takes its entry's fullUrl (urn:uuid:...). The
// subject must be "Patient/<id>" (a version suffix is dropped) or a
// reference to a Patient entry of the same Bundle, which is rewritten to
// that entry's "Patient/<id>"; anything else is refused: an absolute URL of
// another server may name another patient with the same id. A Patient must
// have an id. Digest is the hex SHA-256 of the resource's JSON exactly as
// received (for an entry, the text of entry.resource).
//
// # Codes and specimens
//
// DefaultCodes holds every LOINC and ISO/IEEE 11073 (MDC) input code of the
// shared code reference; codes match only together with their system. A
// site adds local codes with CodeTable.WithAliases (a JSON Lines file, see
// Alias). Only arterial blood is valid for dead-space work, and the
// specimen is decided as follows: the code names it (2019-8 arterial,
// 2021-4 venous, ...); a panel passes its specimen to its components and,
// in the same Bundle, to its hasMember members (24336-0 arterial); for an
// unspecified-specimen code (11557-6, 24338-6, and the "Blood" pH,
// bicarbonate and base-excess codes) the Observation's specimen decides
// when it is a contained Specimen or a Specimen entry whose type is SNOMED
// CT 122552005 "Arterial blood specimen" (122555007 venous, 122554006
// capillary). The display text of a specimen reference is never trusted
// ("arterialised capillary" is capillary blood): without a coded Specimen
// the specimen is SpecimenUnknown and derivations are refused downstream.
// When sources disagree (an arterial code with a capillary Specimen) the
// specimen is SpecimenUnknown, never a guess. Members of a hasMember panel
// that arrive in a separate message carry only what their own code and
// specimen say.
//
// # Units
//
// Values are converted to the canonical UCUM unit of their Quantity
// (Quantity.Unit): pressures to mm[Hg] (from kPa, or the non-UCUM alias
// "mmHg", which is accepted and never emitted), airway pressures in
// cm[H2O], flows, volumes, rates, FiO2 as a fraction, weight in kg, height
// in cm, temperature in Cel. The unit is valueQuantity.code when its system
// is UCUM, else valueQuantity.unit. Factors come from the UCUM definitions
// (units.go names each). FiO2: a value in [21, 100] labelled "%" is a
// percent; a value in [0.21, 1] labelled "1", or in [0.21, 1) labelled "%",
// is a fraction; 1.0 labelled "%", a value in (1, 21) labelled "%",
// anything below 0.21 and anything above 1 labelled "1" is refused as
// ambiguous.
//
// # Status and time
//
// What a Fact's Status means downstream (see Status.Usable and
// Status.Retracts):
//
//   - final, amended, corrected: usable; amended and corrected replace the
//     earlier version of the same Key (see Current).
//   - preliminary: usable; a derivation that uses it is itself preliminary.
//   - registered, unknown: kept, not usable (no result yet, or no
//     knowledge); without a value they are only listed in Ignored.
//   - cancelled, entered-in-error: retractions. They may come without a
//     value and are then facts with Value 0 (also when the value they carry
//     is unusable): what was derived from the Key must be withdrawn.
//
// Effective time is effectiveDateTime, effectiveInstant or effectivePeriod
// (its start, or its end when it has no start), always with a zone and
// stored in UTC; effectiveTiming, a date without time and a time without
// zone are refused, because a value placed in the wrong hour would be
// paired with the wrong ventilator data. Patient facts (sex from gender,
// birth date from birthDate) are patient-level, not windowed: their
// Effective is the zero time, their Status final, and LastUpdated carries
// the Patient's meta.lastUpdated for versioning. A birth date may be
// partial (YYYY or YYYY-MM).
//
// A Goal whose target measures arterial PaCO2 (LOINC 2019-8 or a site alias
// of it) is the patient's own target (QTargetPaCO2, decode_goal.go): its
// Effective is the startDate, its Status follows lifecycleStatus (active
// and accepted are final; cancelled, completed and rejected are cancelled;
// entered-in-error withdraws; the others are registered), a range is kept in
// Text and read at its midpoint. The apparatus dead space of the patient's
// circuit (QApparatusVD) comes from an Observation with a site alias code,
// and so does the patient's airway (QAirway: a valueCodeableConcept of
// SNOMED CT endotracheal or tracheostomy tube, or the service's own
// artificial-airway / whole-airway code), which chooses the anatomic dead
// space model over Site.AnatomicDeadSpace. All three are standing facts for
// Select: the latest at or before the blood gas holds.
//
// # Versions
//
// Current picks one version per Key by a rule that depends only on the set
// of versions, not their arrival order: numeric meta.versionId when every
// version has one, then meta.lastUpdated when every remaining one has it,
// then status precedence, then the larger Digest.
package fhirmap
