package consumer

import (
	"context"
	"errors"
	"time"

	"github.com/ventderive/ventderive/fhirmap"
)

// Store is the provenance store the pipeline needs. The PostgreSQL
// implementation lives in consumer/postgres; tests may use a fake.
type Store interface {
	// Ingest records one input message and what it changes, in one
	// transaction: it claims the inbox key, takes the per-patient locks,
	// stores the facts, loads the snapshot of every affected patient, calls
	// plan once per patient with it, and writes the returned changes
	// (derivations, refusals, outbox rows). It returns ErrDuplicate, having
	// written nothing, when the inbox already holds msg.InboxKey.
	Ingest(ctx context.Context, msg Message, plan PlanFunc) (IngestResult, error)

	// DeadLetter records a poison message. Idempotent on msg.InboxKey.
	DeadLetter(ctx context.Context, msg Message, reason, detail string) error

	// RelayOutboxFrom claims up to limit unpublished outbox rows with a
	// sequence number above after (FOR UPDATE SKIP LOCKED, in their
	// insertion order), calls publish with them, and marks as published
	// those whose sequence numbers publish returns, all in one transaction,
	// also when publish returns an error (which it then returns wrapped).
	// The relay pages through the outbox with after, so that rows it cannot
	// publish never hide the rows behind them.
	RelayOutboxFrom(ctx context.Context, after int64, limit int, publish func(context.Context, []OutboxMessage) (published []int64, err error)) (RelayResult, error)

	// OutboxBacklog counts unpublished outbox rows.
	OutboxBacklog(ctx context.Context) (int64, error)

	// OutboxUnpublished returns those of seqs that are outbox rows not
	// yet published, in order.
	OutboxUnpublished(ctx context.Context, seqs []int64) ([]int64, error)

	// Ping reports whether the store is reachable.
	Ping(ctx context.Context) error
}

// RelayResult says what one RelayOutboxFrom call did.
type RelayResult struct {
	Claimed int   // rows claimed (handed to publish, or Skipped)
	Marked  int   // rows marked published
	Last    int64 // the highest sequence number claimed, 0 when none
	// Skipped are the rows claimed but not handed to publish, in seq
	// order: a stored payload that is not verifiably the bytes recorded
	// (Err wraps ErrDamagedPayload), one that could not be checked now (a
	// store failure: Err is that failure, and RelayOutboxFrom returns it
	// too), or a later version of a derivation whose earlier version was
	// skipped in the same call (Err nil). Damage alone is no error of the
	// call: the rows stay unpublished and are met again by the next pass.
	Skipped []SkippedRow
}

// SkippedRow is an outbox row RelayOutboxFrom claimed and did not publish.
type SkippedRow struct {
	Seq   int64
	MsgID string
	Err   error // why; nil: held behind an earlier version of its derivation
}

// ErrDamagedPayload marks an outbox row whose stored payload is not
// verifiably the bytes recorded for it: a frame that does not decode (or
// names a dictionary the store does not hold intact), decoded bytes whose
// SHA-256 or size is not the one stored beside them, headers that are not
// a JSON object of strings. Such a row is never published.
var ErrDamagedPayload = errors.New("stored outbox row damaged")

// ErrDuplicate reports that a message was seen before; the caller acks it.
var ErrDuplicate = errors.New("duplicate message")

// ErrTransient marks store errors worth retrying (connection lost, serialization
// failure, deadlock, outcome of COMMIT unknown). The store wraps such errors
// with it; anything else is treated as permanent for that message.
var ErrTransient = errors.New("transient store error")

// ErrLocked marks a transient store error that was a lock not granted in
// time (a patient lock held by a stuck transaction, perhaps of a frozen
// replica). The pipeline then retries a group's messages one by one, so
// that one locked patient does not hold back the others.
var ErrLocked = errors.New("lock not granted in time")

// Message is one input message as received from the bus, decoded.
type Message struct {
	// InboxKey identifies the message for idempotency: the hex SHA-256 of the
	// payload bytes.
	InboxKey string
	Subject  string
	// StreamSeq is the JetStream stream sequence, 0 for offline use.
	StreamSeq uint64
	Received  time.Time
	Raw       []byte // the payload as received
	// Resources are the FHIR resources the message held, each with its raw
	// JSON, and Facts what they normalised to. Empty for a dead letter.
	Resources []fhirmap.Resource
	Facts     []fhirmap.Fact
	// Window and Horizon tell the store which stored facts a new fact can
	// affect: blood gases within Window of a ventilator fact, every blood gas
	// within Horizon of a patient-level fact (sex, birth date, height, weight).
	Window  fhirmap.Window
	Horizon time.Duration
	// TempWindow is the same for body temperatures, which are paired in a
	// window of their own (fhirmap.Site.TemperatureWindow); zero means
	// Window.
	TempWindow fhirmap.Window
}

// Snapshot is what the store hands to PlanFunc for one patient, inside the
// ingest transaction and under that patient's lock.
type Snapshot struct {
	Patient string
	// Facts holds every stored version of every fact of the patient that
	// lies in the pairing window of an affected blood gas, plus all of the
	// patient's patient-level facts. The new message's facts are included.
	Facts []fhirmap.Fact
	// Affected are the Keys of the blood-gas facts (QPCO2 of any specimen)
	// whose derivations must be recomputed.
	Affected []string
	// Current holds, for the affected blood gases, the latest stored version
	// of each derivation and refusal (by Derivation.Key / Refusal.Key).
	Current []Stored
}

// Stored is the latest stored state of one derivation key.
type Stored struct {
	Key     string
	Kind    string
	Version int    // 1 for the first version
	Digest  string // Derivation.Digest or Refusal.Digest
	Refused bool   // the latest version is a refusal, not a value
	Status  fhirmap.Status
	Value   float64
}

// PlanFunc works out, from one patient's snapshot, what to record and
// publish. It must be a pure function of the snapshot: the store may call it
// again if the transaction is retried.
type PlanFunc func(Snapshot) (Changes, error)

// Changes is what one message changes for one patient.
type Changes struct {
	// Derivations are new versions to record, each with the version
	// number it gets (Stored.Version+1, or 1) in Versions at the same index.
	Derivations []fhirmap.Derivation
	Versions    []int
	// Refusals are new refusals to record (a refusal replaces a derivation
	// key's latest state, and vice versa).
	Refusals []fhirmap.Refusal
	// Outbox holds the messages to publish after commit.
	Outbox []OutboxMessage
	// Settings is the snapshot of the site settings every derivation and
	// refusal here was made under; the store keeps it once per Digest and
	// links each row to it. Empty when a plan records nothing (and from
	// planners that predate it: the rows then name no snapshot).
	Settings SettingsSnapshot
}

// OutboxMessage is one message waiting to be published.
type OutboxMessage struct {
	Seq     int64 // assigned by the store
	Subject string
	MsgID   string // Nats-Msg-Id: deterministic, "<type>/<derivation id>/_history/<version>"
	Header  map[string]string
	Payload []byte
}

// IngestResult says what an ingest did.
type IngestResult struct {
	Facts       int // facts stored (new keys or new versions)
	Derivations int // new derivation versions
	Retractions int // new versions with status entered-in-error
	Refusals    int
	Outbox      int
	// RefusalReasons counts new refusals by reason code, DerivedKinds new
	// derivation versions by kind, for metrics.
	RefusalReasons map[string]int
	DerivedKinds   map[string]int
}

// BatchStore is a Store that can also record several messages in one
// transaction (group commit). The pipeline detects it with a type assertion
// and then commits a group of messages at once, acknowledging each only
// after that COMMIT; a Store without it is called once per message.
type BatchStore interface {
	Store
	// IngestBatch records msgs as Ingest would record them one after the
	// other in the given order, but in one transaction: later messages see
	// what earlier ones stored and planned. It returns one result per
	// message, at the same index. Each result's Err has Ingest's meaning
	// (nil, ErrDuplicate, wrapped ErrTransient, or a permanent refusal of
	// that message). A message that fails permanently must not fail the
	// others: the store then records the others without it.
	IngestBatch(ctx context.Context, msgs []Message, plan PlanFunc) []BatchResult
}

// BatchResult is what IngestBatch did with one message.
type BatchResult struct {
	IngestResult
	Err error
}
