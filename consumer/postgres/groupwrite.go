package postgres

import (
	"encoding/json"
	"fmt"
	"reflect"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgtype"

	"github.com/ventderive/ventderive/consumer"
)

// The writes of a group's hot messages (IngestBatch) are collected while
// the messages are planned one after the other, and sent once, at the end
// of the group, as one statement per table: where Ingest sends one
// derivation statement (derivation, lineage and head) per derivation and
// one refusal statement per refusal, a group sends a few multi-row ones.
//
// What a later message of the group reads must still be what the
// sequential order would have written before it. Its facts are stored and
// read as before; of the writes, only the heads are read back (the
// snapshot's Current), so snapshotHeadsPendingSQL lays the group's pending
// heads over the stored ones. Derivations, refusals and outbox rows are
// not read by the ingest path.
//
// The rows are written in the order the sequential path writes them, so
// the identity columns (derivation, refusal and outbox ids) come out in
// the same order: a derivation statement (insertDerivationsSQL) holds no
// key twice, as its supersedes lookup does not see rows of its own
// statement; the second version of a key in one group starts a new
// statement. Refusals are split the same way (their lineage is joined on
// the key). The heads are written last, one row per key with the key's
// final state, since an upsert may not touch one row twice.
const (
	insertDerivationsSQL = `
WITH u AS MATERIALIZED (
    SELECT * FROM unnest($1::text[], $2::int[], $3::text[], $4::text[], $5::text[], $6::text[], $7::text[], $8::text[],
        $9::timestamptz[], $10::float8[], $11::text[], $12::text[], $13::text[], $14::text[], $15::text[], $16::text[],
        $17::text[], $18::text[], $19::text[], $20::text[], $21::text[], $22::text[], $23::text[], $24::text[],
        $25::text[], $26::text[], $27::text[])
    WITH ORDINALITY AS u(key, version, observation_id, kind, patient_ref, patient_hash, encounter, blood_gas_key,
        effective, value, unit, method, method_version, constants, assumptions, basis, interp_code, interp_text,
        interp_source, flags, status, retracted, algorithm, digest, inbox_key, record, settings_digest, ord)
), d AS (
    INSERT INTO derivation (key, version, observation_id, kind, patient_ref, patient_hash, encounter,
        blood_gas_key, effective, value, unit, method, method_version, constants, assumptions, basis,
        interp_code, interp_text, interp_source, flags, status, retracted, algorithm, digest,
        supersedes_id, inbox_key, created_at, record, settings_digest)
    SELECT u.key, u.version, u.observation_id::uuid, u.kind, u.patient_ref, u.patient_hash, u.encounter,
        u.blood_gas_key, u.effective, u.value, u.unit, u.method, u.method_version, u.constants::jsonb,
        u.assumptions::jsonb, u.basis, u.interp_code, u.interp_text, u.interp_source, u.flags::jsonb, u.status,
        u.retracted, u.algorithm, u.digest,
        (SELECT p.id FROM derivation p WHERE p.key = u.key AND p.version = u.version - 1),
        decode(u.inbox_key, 'hex'), $28, u.record::jsonb, nullif(u.settings_digest, '')
    FROM u ORDER BY u.ord
    RETURNING id, key, version
)
INSERT INTO derivation_input (derivation_id, ordinal, role, fact_key, fact_digest, resource_ref, time_offset, fallback)
SELECT d.id, l.ordinal, l.role, l.fact_key, l.fact_digest, l.resource_ref, l.offset_us * interval '1 microsecond', l.fallback
FROM unnest($29::int[], $30::int[], $31::text[], $32::text[], $33::text[], $34::text[], $35::bigint[], $36::text[])
     AS l(n, ordinal, role, fact_key, fact_digest, resource_ref, offset_us, fallback)
JOIN u ON u.ord = l.n
JOIN d ON d.key = u.key AND d.version = u.version`

	insertRefusalsSQL = `
WITH u AS MATERIALIZED (
    SELECT * FROM unnest($1::text[], $2::text[], $3::text[], $4::text[], $5::text[], $6::timestamptz[], $7::text[],
        $8::text[], $9::text[], $10::text[], $11::text[])
    WITH ORDINALITY AS u(key, kind, patient_ref, patient_hash, blood_gas_key, effective, reason, detail, digest,
        inbox_key, settings_digest, ord)
), r AS (
    INSERT INTO refusal (key, kind, patient_ref, patient_hash, blood_gas_key, effective, reason, detail,
        digest, inbox_key, created_at, settings_digest)
    SELECT u.key, u.kind, u.patient_ref, u.patient_hash, u.blood_gas_key, u.effective, u.reason, u.detail,
        u.digest, decode(u.inbox_key, 'hex'), $12, nullif(u.settings_digest, '')
    FROM u ORDER BY u.ord
    RETURNING id, key
)
INSERT INTO refusal_input (refusal_id, ordinal, role, fact_key, fact_digest, resource_ref, time_offset, fallback)
SELECT r.id, l.ordinal, l.role, l.fact_key, l.fact_digest, l.resource_ref, l.offset_us * interval '1 microsecond', l.fallback
FROM unnest($13::int[], $14::int[], $15::text[], $16::text[], $17::text[], $18::text[], $19::bigint[], $20::text[])
     AS l(n, ordinal, role, fact_key, fact_digest, resource_ref, offset_us, fallback)
JOIN u ON u.ord = l.n
JOIN r ON r.key = u.key`

	// writeHeadsSQL writes each key's final state after the group, as the
	// sequence of insertDerivationSQL and insertRefusalSQL upserts would
	// have left it: a key whose last change is a derivation takes all of
	// it; one whose last change is a refusal is refused with the refusal's
	// digest and keeps the version, status and value of the group's last
	// derivation of it (version NULL: none in the group, so the stored
	// head's, or 0 for a new head). The derivation is found by its unique
	// (key, version), the refusal as the key's newest (written by this
	// group under the patient's lock); max(id + 0) keeps the lookup on
	// refusal_key rather than a backward scan of the primary key.
	writeHeadsSQL = `
INSERT INTO head (key, kind, patient_ref, patient_hash, blood_gas_key, version, refused, derivation_id,
    refusal_id, digest, status, value, updated_at)
SELECT p.key, p.kind, p.patient_ref, p.patient_hash, p.blood_gas_key, coalesce(p.version, 0), p.refused,
    (SELECT d.id FROM derivation d WHERE d.key = p.key AND d.version = p.version),
    CASE WHEN p.refused THEN (SELECT max(r.id + 0) FROM refusal r WHERE r.key = p.key) END,
    p.digest, coalesce(p.status, ''), coalesce(p.value, 0), $11
FROM unnest($1::text[], $2::text[], $3::text[], $4::text[], $5::text[], $6::int[], $7::boolean[], $8::text[],
    $9::text[], $10::float8[]) WITH ORDINALITY
    AS p(key, kind, patient_ref, patient_hash, blood_gas_key, version, refused, digest, status, value, ord)
ORDER BY p.ord
ON CONFLICT (key) DO UPDATE SET
    version = CASE WHEN EXCLUDED.derivation_id IS NULL THEN head.version ELSE EXCLUDED.version END,
    derivation_id = coalesce(EXCLUDED.derivation_id, head.derivation_id),
    status = CASE WHEN EXCLUDED.derivation_id IS NULL THEN head.status ELSE EXCLUDED.status END,
    value = CASE WHEN EXCLUDED.derivation_id IS NULL THEN head.value ELSE EXCLUDED.value END,
    refused = EXCLUDED.refused, refusal_id = EXCLUDED.refusal_id, digest = EXCLUDED.digest,
    updated_at = EXCLUDED.updated_at`

	// insertOutboxRowsSQL is insertOutboxSQL with an inbox key per row;
	// it returns the inbox key of every row it stored, to count them per
	// message.
	insertOutboxRowsSQL = `
INSERT INTO outbox (subject, msg_id, headers, stored_payload, payload_sha256, payload_size, inbox_key, created_at)
SELECT u.subject, u.msg_id, u.headers::jsonb, u.payload, u.sum, u.size, decode(u.inbox_key, 'hex'), $6
FROM unnest($1::text[], $2::text[], $3::text[], $4::bytea[], $5::text[], $7::bytea[], $8::int[]) WITH ORDINALITY
     AS u(subject, msg_id, headers, payload, inbox_key, sum, size, ord)
ORDER BY u.ord
ON CONFLICT (msg_id) DO NOTHING
RETURNING encode(inbox_key, 'hex')`

	// snapshotHeadsPendingSQL is snapshotHeadsSQL with the group's pending
	// heads of the patient ($12..$19: key, blood gas, kind, version,
	// digest, refused, status, value; version, status and value NULL when
	// the group only refused the key) laid over the stored ones. A key's
	// patient, blood gas and kind are its parts (head_key_parts), so a
	// pending head matches the stored row of its key whenever both are
	// filtered by the same patient and blood gas.
	snapshotHeadsPendingSQL = affectedCTE + `,
db AS (
    SELECT h.key, h.kind, h.version, h.digest, h.refused, h.status, h.value
    FROM affected a CROSS JOIN LATERAL (
        SELECT key, kind, version, digest, refused, status, value FROM head
        WHERE patient_ref = $1 AND blood_gas_key = a.key
        OFFSET 0) h
), pend AS (
    SELECT * FROM unnest($12::text[], $13::text[], $14::text[], $15::int[], $16::text[], $17::boolean[],
        $18::text[], $19::float8[]) AS p(key, blood_gas_key, kind, version, digest, refused, status, value)
    WHERE p.blood_gas_key IN (SELECT key FROM affected)
)
SELECT coalesce(d.key, p.key), coalesce(d.kind, p.kind), coalesce(p.version, d.version, 0),
    coalesce(p.digest, d.digest), coalesce(p.refused, d.refused), coalesce(p.status, d.status, ''),
    coalesce(p.value, d.value, 0)
FROM db d FULL JOIN pend p ON p.key = d.key
ORDER BY 1`
)

// pendingHead is a head the group changed: its parts, as first written,
// and its state after the group's changes so far. derived: the group
// derived a version of it (version, status and value are that version's).
type pendingHead struct {
	key, kind, patient, bloodGas string
	derived                      bool
	version                      int32
	status                       string
	value                        float64
	refused                      bool
	digest                       string
}

// groupWrites collects the writes of a group's hot messages.
type groupWrites struct {
	s   *Store
	now time.Time

	settings     [][4]any // digest, snapshot, inbox key: insertSettingsSQL arguments
	seenSettings map[string]bool

	ders, refs [][]any // per row: the columns of insertDerivationsSQL / insertRefusalsSQL before lineage
	derLin     []lineage
	refLin     []lineage

	heads     map[string]*pendingHead
	headOrder []string
	byPatient map[string][]*pendingHead

	outSubj, outID, outHdr, outInbox []string
	outPayload, outSum               [][]byte // stored payloads and their exact bytes' SHA-256
	outSize                          []int32
	outMsg                           map[string][]int // inbox key -> message indexes (one, barring duplicates)
	outWant                          map[int]int
}

func newGroupWrites(s *Store, now time.Time) *groupWrites {
	return &groupWrites{s: s, now: now, seenSettings: map[string]bool{}, heads: map[string]*pendingHead{},
		byPatient: map[string][]*pendingHead{}, outMsg: map[string][]int{}, outWant: map[int]int{}}
}

// queueHeads queues the heads statement of one patient's snapshot: with
// the group's pending heads of the patient laid over the stored ones, when
// there are any. w may be nil (Ingest). known: args carry the affected
// blood gases (knownAffectedCTE).
func (w *groupWrites) queueHeads(b *pgx.Batch, patient string, args []any, known bool) {
	if w == nil || len(w.byPatient[patient]) == 0 {
		if known {
			b.Queue(snapshotHeadsKnownSQL, args...)
		} else {
			b.Queue(snapshotHeadsSQL, args...)
		}
		return
	}
	sql := snapshotHeadsPendingSQL
	if known {
		sql = snapshotHeadsPendingKnownSQL
	}
	ps := w.byPatient[patient]
	n := len(ps)
	key, bg, kind, digest := mk(n), mk(n), mk(n), mk(n)
	version, status, value := make([]pgtype.Int4, n), make([]pgtype.Text, n), make([]pgtype.Float8, n)
	refused := make([]bool, n)
	for i, p := range ps {
		key[i], bg[i], kind[i], digest[i], refused[i] = p.key, p.bloodGas, p.kind, p.digest, p.refused
		if p.derived {
			version[i] = pgtype.Int4{Int32: p.version, Valid: true}
			status[i] = pgtype.Text{String: p.status, Valid: true}
			value[i] = pgtype.Float8{Float64: p.value, Valid: true}
		}
	}
	b.Queue(sql, append(args[:len(args):len(args)], key, bg, kind, version, digest, refused, status, value)...)
}

// head returns the pending head of key, making it with the given parts.
func (w *groupWrites) head(key, kind, patient, bloodGas string) *pendingHead {
	if h, ok := w.heads[key]; ok {
		return h
	}
	h := &pendingHead{key: key, kind: kind, patient: patient, bloodGas: bloodGas}
	w.heads[key] = h
	w.headOrder = append(w.headOrder, key)
	w.byPatient[patient] = append(w.byPatient[patient], h)
	return h
}

// add collects what the plans of message i returned, as queueChanges
// would queue it, and counts it into res.
func (w *groupWrites) add(i int, msg consumer.Message, order []*patientPlan, res *consumer.IngestResult) error {
	s, now := w.s, w.now
	for _, p := range order {
		if st := p.changes.Settings; st.Digest != "" && !w.seenSettings[st.Digest] {
			// Later messages' inserts of the same snapshot do nothing.
			w.seenSettings[st.Digest] = true
			w.settings = append(w.settings, [4]any{st.Digest, string(st.JSON), msg.InboxKey, now})
		}
	}
	wanted := 0
	for _, p := range order {
		settings := p.changes.Settings.Digest
		for j, d := range p.changes.Derivations {
			args, err := s.derivationArgs(d, p.changes.Versions[j], msg.InboxKey, now, settings)
			if err != nil {
				return err
			}
			w.ders = append(w.ders, args)
			w.derLin = append(w.derLin, lineageOf(d.Inputs))
			h := w.head(d.Key, d.Kind, d.Patient, d.BloodGas)
			h.derived, h.version, h.status, h.value = true, int32(p.changes.Versions[j]), string(d.Status), d.Result.Value
			h.refused, h.digest = false, d.Digest
			countDerivation(res, d)
		}
		for _, r := range p.changes.Refusals {
			w.refs = append(w.refs, []any{r.Key, r.Kind, r.Patient, s.hash(r.Patient), r.BloodGas, r.Effective.UTC(),
				r.Reason, r.Detail, r.Digest, msg.InboxKey, settings})
			w.refLin = append(w.refLin, lineageOf(r.Considered))
			h := w.head(r.Key, r.Kind, r.Patient, r.BloodGas)
			h.refused, h.digest = true, r.Digest
			res.Refusals++
			if res.RefusalReasons == nil {
				res.RefusalReasons = map[string]int{}
			}
			res.RefusalReasons[r.Reason]++
		}
		for _, o := range p.changes.Outbox {
			hdr, err := json.Marshal(orEmpty(o.Header))
			if err != nil {
				return fmt.Errorf("encode outbox headers: %w", err)
			}
			w.outSubj, w.outID, w.outHdr = append(w.outSubj, o.Subject), append(w.outID, o.MsgID), append(w.outHdr, string(hdr))
			stored, sum, size := storedOutbox(o.Payload)
			w.outPayload, w.outInbox = append(w.outPayload, stored), append(w.outInbox, msg.InboxKey)
			w.outSum, w.outSize = append(w.outSum, sum), append(w.outSize, size)
			wanted++
		}
	}
	if wanted > 0 {
		w.outMsg[msg.InboxKey] = append(w.outMsg[msg.InboxKey], i)
		w.outWant[i] = wanted
	}
	return nil
}

// segments splits rows into runs in which no key (column 0) repeats.
func segments(rows [][]any) [][2]int {
	var out [][2]int
	start, seen := 0, map[any]bool{}
	for i, r := range rows {
		if seen[r[0]] {
			out = append(out, [2]int{start, i})
			start, seen = i, map[any]bool{}
		}
		seen[r[0]] = true
	}
	if start < len(rows) {
		out = append(out, [2]int{start, len(rows)})
	}
	return out
}

// columns turns rows into one typed array per column, of the type of
// the first row's value (strings of a named string type become strings).
func columns(rows [][]any, width int) []any {
	cols := make([]any, width)
	n := len(rows)
	for c := range width {
		switch v := rows[0][c].(type) {
		case int:
			a := make([]int32, n)
			for i, r := range rows {
				a[i] = int32(r[c].(int))
			}
			cols[c] = a
		case float64:
			a := make([]float64, n)
			for i, r := range rows {
				a[i] = r[c].(float64)
			}
			cols[c] = a
		case time.Time:
			a := make([]time.Time, n)
			for i, r := range rows {
				a[i] = r[c].(time.Time)
			}
			cols[c] = a
		case *string:
			a := make([]*string, n)
			for i, r := range rows {
				a[i] = r[c].(*string)
			}
			cols[c] = a
		default:
			if reflect.ValueOf(v).Kind() != reflect.String {
				panic(fmt.Sprintf("group writes: column %d of type %T", c, v))
			}
			a := make([]string, n)
			for i, r := range rows {
				a[i] = reflect.ValueOf(r[c]).String()
			}
			cols[c] = a
		}
	}
	return cols
}

// lineageColumns flattens the lineage of rows lo..hi: n is the row's
// ordinal in the statement (1-based), ordinal the input's.
func lineageColumns(ls []lineage) []any {
	var n, ord []int32
	var role, key, digest, res, fb []string
	var off []int64
	for i, l := range ls {
		for j := range l.role {
			n, ord = append(n, int32(i+1)), append(ord, int32(j+1))
			role, key, digest, res = append(role, l.role[j]), append(key, l.key[j]), append(digest, l.digest[j]), append(res, l.resource[j])
			off, fb = append(off, l.offsetUS[j]), append(fb, l.fallback[j])
		}
	}
	if n == nil {
		n, ord, role, key, digest, res, off, fb = []int32{}, []int32{}, []string{}, []string{}, []string{}, []string{}, []int64{}, []string{}
	}
	return []any{n, ord, role, key, digest, res, off, fb}
}

// queued is what queue put in the batch, for read.
type groupQueued struct{ settings, ders, refs, heads, outbox int }

// queue puts every collected write in b: settings, derivations, refusals,
// heads, outbox.
func (w *groupWrites) queue(b *pgx.Batch) groupQueued {
	var q groupQueued
	for _, st := range w.settings {
		b.Queue(insertSettingsSQL, st[:]...)
		q.settings++
	}
	for _, sg := range segments(w.ders) {
		b.Queue(insertDerivationsSQL, w.derivationArgs(w.ders[sg[0]:sg[1]], w.derLin[sg[0]:sg[1]])...)
		q.ders++
	}
	for _, sg := range segments(w.refs) {
		args := append(columns(w.refs[sg[0]:sg[1]], 11), w.now)
		args = append(args, lineageColumns(w.refLin[sg[0]:sg[1]])...)
		b.Queue(insertRefusalsSQL, args...)
		q.refs++
	}
	if n := len(w.headOrder); n > 0 {
		key, kind, pat, hash, bg, digest := mk(n), mk(n), mk(n), mk(n), mk(n), mk(n)
		version, status, value := make([]pgtype.Int4, n), make([]pgtype.Text, n), make([]pgtype.Float8, n)
		refused := make([]bool, n)
		for i, k := range w.headOrder {
			h := w.heads[k]
			key[i], kind[i], pat[i], hash[i], bg[i], digest[i], refused[i] = h.key, h.kind, h.patient, w.s.hash(h.patient), h.bloodGas, h.digest, h.refused
			if h.derived {
				version[i] = pgtype.Int4{Int32: h.version, Valid: true}
				status[i] = pgtype.Text{String: h.status, Valid: true}
				value[i] = pgtype.Float8{Float64: h.value, Valid: true}
			}
		}
		b.Queue(writeHeadsSQL, key, kind, pat, hash, bg, version, refused, digest, status, value, w.now)
		q.heads++
	}
	if len(w.outSubj) > 0 {
		b.Queue(insertOutboxRowsSQL, w.outSubj, w.outID, w.outHdr, w.outPayload, w.outInbox, w.now, w.outSum, w.outSize)
		q.outbox = len(w.outSubj)
	}
	return q
}

// derivationArgs are insertDerivationsSQL's arguments for rows (each as
// Store.derivationArgs builds it) and their lineage.
func (w *groupWrites) derivationArgs(rows [][]any, lin []lineage) []any {
	// Store.derivationArgs: columns 0..24 (key .. inbox key), 25 created
	// at, 26..31 lineage, 32 record, 33 settings digest.
	cut := make([][]any, len(rows))
	for i, r := range rows {
		c := make([]any, 0, 27)
		c = append(c, r[:25]...)
		c = append(c, r[32], r[33])
		cut[i] = c
	}
	args := columns(cut, 27)
	args = append(args, w.now)
	return append(args, lineageColumns(lin)...)
}

// read reads what queue queued and counts the outbox rows stored per
// message into res.
func (w *groupWrites) read(br pgx.BatchResults, q groupQueued, res []consumer.IngestResult) error {
	if err := readInserts(br, q.settings, q.ders, q.refs); err != nil {
		return err
	}
	if q.heads > 0 {
		if _, err := br.Exec(); err != nil {
			return fmt.Errorf("write heads: %w", err)
		}
	}
	if q.outbox > 0 {
		rows, err := br.Query()
		if err != nil {
			return fmt.Errorf("insert outbox: %w", err)
		}
		stored, err := pgx.CollectRows(rows, pgx.RowTo[string])
		if err != nil {
			return fmt.Errorf("insert outbox: %w", err)
		}
		for _, k := range stored {
			// The first message of this key with outbox rows: a key is
			// claimed once per group.
			if is := w.outMsg[k]; len(is) > 0 {
				res[is[0]].Outbox++
			}
		}
		for i, want := range w.outWant {
			if res[i].Outbox < want {
				// A message id already used: the earlier row carries it.
				w.s.log.Warn("outbox message ids already present", "skipped", want-res[i].Outbox)
			}
		}
	}
	return nil
}
