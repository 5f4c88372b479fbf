// Package postgres is the PostgreSQL provenance store of ventderive: it
// implements consumer.Store (inbox, facts, derivation versions with their
// lineage, refusals, outbox, dead letters) and the reviewer's audit queries.
//
// # Ingest
//
// Store.Ingest handles one input message in one transaction and two
// batched round trips (besides BEGIN and COMMIT):
//
//  1. claim the inbox key (nothing claimed: consumer.ErrDuplicate, nothing
//     written), take each patient's transaction-scoped advisory lock in
//     sorted order, store the resources and facts (keeping only new
//     identity and digest pairs), and per patient work out the affected
//     blood gases and load their snapshot and current heads;
//  2. after calling the plan once per patient with affected blood gases,
//     write the derivation versions with their inputs, the refusals with
//     the inputs they considered, the head updates and the outbox rows.
//
// A message that moves a fact to another patient (a corrected subject) costs
// one more round trip: the old patient is locked and loaded too. IngestBatch
// (group commit) records several messages in one transaction, each as
// Ingest would, with one round trip per message.
//
// A blood gas (a pco2 fact of any specimen) is affected by a new version of
// itself; by a new patient-level fact (sex, birth date, height, weight) when
// it lies within Message.Horizon before the patient's latest blood gas; and by
// any other new fact at time t when its effective time lies in
// [t - Window.After, t + Window.Before] (for a body temperature, TempWindow
// instead of Window: temperatures are paired in a window of their own),
// where t ranges over every stored version of that fact (a corrected time
// also reopens the blood gases around the old one). The snapshot holds every
// version of every fact key of the patient that has a version in the window
// of an affected blood gas (or, for body temperatures, in its TempWindow), every
// version of the affected blood gases, and every patient-level fact, in the
// order they were stored.
//
// # Errors
//
// Driver errors are translated at this package's edge. Only errors the
// input can cause are permanent: data exceptions (class 22), integrity
// constraint violations (23) and program limits (54). Every other server
// error (read-only transaction 25006 during a failover, shutdowns
// 57P01..57P03, class 08, serialization failure 40001, deadlock 40P01, lock
// and statement timeouts 55P03 and 57014, ...), connection loss and a
// COMMIT whose outcome is unknown are wrapped with consumer.ErrTransient
// (the inbox key makes a retry safe). Server errors become a *DBError
// carrying only the SQLSTATE, constraint, table and column names: the
// server's message and detail can echo key values (patient references) and
// are neither returned nor logged.
//
// # Times
//
// PostgreSQL keeps microseconds: times are stored truncated to the
// microsecond and read back in UTC.
package postgres
