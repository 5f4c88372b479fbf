// Package consumer is the service: a durable JetStream pull consumer that
// turns FHIR R4 input into recorded, published, advisory derived values.
//
// # Per message
//
//  1. Strict decode and normalise (fhirmap.Decode). Poison input is recorded
//     as a dead letter, copied to the dead-letter subject with its reason in
//     a header, and terminated (TermWithReason); later messages keep flowing.
//  2. Store.Ingest, one transaction: claim the inbox key (the SHA-256 of the
//     payload) so a redelivery or a republish changes nothing; take the
//     per-patient advisory locks; store the facts; load every blood gas the
//     new facts affect (the blood gas itself, earlier gases whose pairing
//     window a late ventilator reading falls into, all recent gases for a
//     patient-level fact) with the data around it; Plan the changes; write
//     derivations, refusals and outbox rows; COMMIT.
//     With a store that implements BatchStore (PostgreSQL does), the
//     messages of a pull are dealt to lanes by patient and each lane records
//     up to GroupMax messages (default 64, or what arrived within GroupWait,
//     5 ms) in one transaction, each exactly as Ingest would in order: group
//     commit. A message the store refuses is isolated by recording that group
//     again message by message.
//  3. Ack only after COMMIT. A transient failure is naked with a bounded,
//     growing delay; a message the store refuses outright becomes a dead
//     letter.
//  4. The relay publishes the outbox with a deterministic Nats-Msg-Id
//     ("Observation/<id>/_history/<version>") and marks rows published on
//     the server's acknowledgement. A crash between the two republishes the
//     same id, which the output stream drops as a duplicate.
//
// # Order independence
//
// Plan recomputes each affected blood gas from the current version of every
// stored fact, with deterministic tie-breaking, and compares the result with
// the stored head by content digest. The final set of derived values is
// therefore a function of the set of inputs, not of their arrival order or of
// which replica handled which message; only version numbers and the number of
// intermediate versions depend on order.
//
// # Replicas
//
// Replicas share the durable consumer and the database. Fetch (not Consume)
// keeps each replica's buffer to one small batch, so a replica that dies
// leaves at most a batch to be redelivered after AckWait.
package consumer
