package postgres

import (
	"context"
	"errors"
	"fmt"
	"slices"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/ventderive/ventderive/consumer"
)

var _ consumer.BatchStore = (*Store)(nil)

const (
	// lockPatientsSQL takes the patient locks of a whole group in the
	// order of $1, which the caller sorts: the plan is a function scan of
	// unnest, which yields the elements in array order, feeding the
	// aggregate row by row. Same lock keys as lockPatientSQL, so single and
	// grouped ingests of different replicas serialise on the same patients.
	lockPatientsSQL = `
SELECT count(pg_advisory_xact_lock(hashtextextended('ventderive/patient/' || u.ref, 0)))
FROM unnest($1::text[]) AS u(ref)`

	// claimInboxesSQL claims the inbox keys of a group in one statement
	// (in key order, so that two groups holding the same redelivered
	// message cannot deadlock on it) and returns those it claimed, as hex;
	// a key listed twice is claimed once. The keys arrive as hex and are
	// stored as their 32 bytes, the subjects as their inbox_subject ids
	// (migration 0019). IngestBatch commits a new subject before the
	// transaction (seedLookups); one still missing (the seed failed, or no
	// lookup cache) is inserted by this statement, in sorted order, and ON
	// CONFLICT DO UPDATE (a no-op update) returns its id even when a
	// concurrent transaction committed it first, as insertFactsSQL does for
	// its lookup rows.
	claimInboxesSQL = `
WITH ns AS (
    INSERT INTO inbox_subject (subject)
    SELECT DISTINCT s FROM unnest($2::text[]) AS s
    WHERE NOT EXISTS (SELECT 1 FROM inbox_subject x WHERE x.subject = s)
    ORDER BY 1
    ON CONFLICT (subject) DO UPDATE SET subject = EXCLUDED.subject
    RETURNING id, subject
)
INSERT INTO inbox (inbox_key, subject_id, stream_seq, received, recorded_at, resources, facts, raw)
SELECT decode(u.inbox_key, 'hex'),
    coalesce((SELECT x.id FROM inbox_subject x WHERE x.subject = u.subject), (SELECT n.id FROM ns n WHERE n.subject = u.subject)),
    u.stream_seq, u.received, $8, u.resources, u.facts, u.raw
FROM unnest($1::text[], $2::text[], $3::bigint[], $4::timestamptz[], $5::int[], $6::int[], $7::int[], $9::bytea[])
     AS u(inbox_key, subject, stream_seq, received, resources, facts, ord, raw)
ORDER BY decode(u.inbox_key, 'hex'), u.ord
ON CONFLICT (inbox_key) DO NOTHING
RETURNING encode(inbox_key, 'hex')`
)

// IngestBatch implements consumer.BatchStore: group commit. It records
// msgs in one transaction, each exactly as Ingest would in that order. The
// transaction first takes the locks of every patient of the group in
// sorted order, then claims all inbox keys in one statement and finds the
// hot patients (hotPatientsSQL); a message whose key was already claimed
// (by an earlier transaction or earlier in the group) gets
// consumer.ErrDuplicate and writes nothing. The facts of every cold
// message (coldMessages: it can affect no blood gas) are stored in one
// insert, ahead of the others; they change nothing the others read, so
// only fact ids differ from the sequential order. The hot messages take
// one or two round trips each, in order (facts, affected blood gases,
// snapshots, plan); what their plans write is collected (groupWrites) and
// sent in one last round trip, one statement per table, with the pending
// heads laid over the stored ones in the later messages' snapshots, so
// that every plan sees what the sequential order would have shown it.
//
// Failure modes: serialization failures and deadlocks retry the group in
// place (three attempts, as Ingest); another transient failure, including a
// COMMIT whose outcome is unknown, is returned for every message (the inbox
// absorbs their redelivery). Any other failure (a constraint the content
// violates, a plan error) means some message is at fault: the group is
// rolled back and each message is then recorded on its own with Ingest, so
// that only the faulty one fails. A group of one is an Ingest.
func (s *Store) IngestBatch(ctx context.Context, msgs []consumer.Message, plan consumer.PlanFunc) []consumer.BatchResult {
	out := make([]consumer.BatchResult, len(msgs))
	s.seedLookups(ctx, msgs)
	if len(msgs) == 1 {
		out[0].IngestResult, out[0].Err = s.Ingest(ctx, msgs[0], plan)
		return out
	}
	if len(msgs) == 0 {
		return out
	}
	err := s.retry(ctx, "group ingest", func() error {
		clear(out)
		return s.ingestBatchOnce(ctx, msgs, plan, out)
	})
	if err == nil {
		s.loadWanted(ctx)
		return out
	}
	if errors.Is(err, consumer.ErrTransient) || ctx.Err() != nil {
		for i := range out {
			out[i] = consumer.BatchResult{Err: err}
		}
		return out
	}
	// One message (or more) is refused for its content: find which by
	// recording each on its own. The log names no message: the error is
	// reduced to SQLSTATE and constraint names.
	s.log.Warn("group ingest failed; recording its messages one by one", "messages", len(msgs), "err", err)
	for i, m := range msgs {
		out[i].IngestResult, out[i].Err = s.Ingest(ctx, m, plan)
	}
	return out
}

// ingestBatchOnce is one attempt at the group's transaction. It fills out
// only when it returns nil.
func (s *Store) ingestBatchOnce(ctx context.Context, msgs []consumer.Message, plan consumer.PlanFunc, out []consumer.BatchResult) error {
	now := s.now().UTC()
	res := make([]consumer.IngestResult, len(msgs))
	fresh := make([]bool, len(msgs))
	err := s.inTx(ctx, "ingest group", func(tx pgx.Tx) error {
		// Round trip 1: the locks of every patient of the group, sorted,
		// then every inbox key.
		orders := make([][]*patientPlan, len(msgs))
		var refs []string
		n := len(msgs)
		keys, subjects := make([]string, n), make([]string, n)
		seqs, received := make([]int64, n), make([]time.Time, n)
		nres, nfacts, ords := make([]int32, n), make([]int32, n), make([]int32, n)
		raws := make([][]byte, n)
		for i, m := range msgs {
			orders[i] = patientPlans(s, m)
			for _, p := range orders[i] {
				refs = append(refs, p.ref)
			}
			keys[i], subjects[i], seqs[i], received[i] = m.InboxKey, m.Subject, int64(m.StreamSeq), m.Received.UTC()
			nres[i], nfacts[i], ords[i], raws[i] = int32(len(m.Resources)), int32(len(m.Facts)), int32(i), storedRaw(m.Raw)
		}
		slices.Sort(refs)
		refs = slices.Compact(refs)
		b := &pgx.Batch{}
		b.Queue(pointLookupsSQL)
		if len(refs) > 0 {
			b.Queue(lockPatientsSQL, refs)
		}
		b.Queue(claimInboxesSQL, keys, subjects, seqs, received, nres, nfacts, ords, now, raws)
		// The patients whose facts could affect a blood gas, under their
		// locks; with windows that differ inside the group (not one site's
		// settings), every message takes the sequential path.
		setBased := sameWindows(msgs) && slices.ContainsFunc(msgs, func(m consumer.Message) bool { return len(m.Facts) > 0 })
		if setBased {
			b.Queue(hotPatientsSQL, hotArgs(msgs)...)
		}
		br := tx.SendBatch(ctx, b)
		if _, err := br.Exec(); err != nil {
			br.Close()
			return fmt.Errorf("plan settings: %w", err)
		}
		if len(refs) > 0 {
			if _, err := br.Exec(); err != nil {
				br.Close()
				return fmt.Errorf("lock patients: %w", err)
			}
		}
		rows, err := br.Query()
		if err != nil {
			br.Close()
			return fmt.Errorf("claim inbox: %w", err)
		}
		claimed, err := pgx.CollectRows(rows, pgx.RowTo[string])
		if err != nil {
			br.Close()
			return fmt.Errorf("claim inbox: %w", err)
		}
		cold := make([]bool, n)
		moved := map[string]bool{}
		if setBased {
			rows, err := br.Query()
			if err != nil {
				br.Close()
				return fmt.Errorf("hot patients: %w", err)
			}
			var hot []string
			var ref string
			var mv bool
			if _, err := pgx.ForEachRow(rows, []any{&ref, &mv}, func() error {
				hot = append(hot, ref)
				if mv {
					moved[ref] = true
				}
				return nil
			}); err != nil {
				br.Close()
				return fmt.Errorf("hot patients: %w", err)
			}
			cold = coldMessages(msgs, hot)
		}
		if err := br.Close(); err != nil {
			return fmt.Errorf("claim inbox: %w", err)
		}
		// The first message with a claimed key is the one recorded; any
		// later one with the same key is a duplicate, like a redelivery.
		left := make(map[string]bool, len(claimed))
		for _, k := range claimed {
			left[k] = true
		}
		for i, m := range msgs {
			if left[m.InboxKey] {
				fresh[i] = true
				delete(left, m.InboxKey)
			}
		}

		// The facts of every fresh cold message, in one statement: they
		// affect no blood gas, so nothing else is read or planned for
		// them. It travels with the first round trip below.
		var coldLists [][]any
		var coldFacts int
		var coldKeys, coldInbox []string
		for i, m := range msgs {
			if fresh[i] && cold[i] && len(m.Facts) > 0 {
				coldLists = append(coldLists, s.factArgs(m, now))
				coldFacts += len(m.Facts)
				coldKeys = append(coldKeys, factKeys(m)...)
				coldInbox = append(coldInbox, m.InboxKey)
			}
		}
		coldArgs, err := concatArgs(coldLists)
		if err != nil {
			return err
		}
		coldStored := -1

		// Round trips 2..: each hot message's facts are stored and its
		// snapshots loaded, in message order, so every message sees the
		// facts the ones before it stored; its plan's writes are collected
		// (groupWrites) and the heads among them laid over the stored
		// heads of later snapshots. Cold messages were stored above; they
		// change nothing these see. The cold facts travel with the first
		// round trip.
		w := newGroupWrites(s, now)
		sendCold := func(b *pgx.Batch) bool {
			if coldArgs == nil || coldStored >= 0 {
				return false
			}
			b.Queue(insertFactsSQL, coldArgs...)
			return true
		}
		readCold := func(br pgx.BatchResults) error {
			tag, err := br.Exec()
			if err != nil {
				return fmt.Errorf("insert facts: %w", err)
			}
			coldStored = int(tag.RowsAffected())
			return nil
		}
		// The hot messages in waves (hotWaves): a wave's facts in one insert
		// and its lookups in the same round trip, its snapshots in one more.
		// Without hotPatientsSQL (windows differ) every message is a wave.
		var hotIdx []int
		for i := range n {
			if fresh[i] && !cold[i] {
				hotIdx = append(hotIdx, i)
			}
		}
		var waves [][]int
		if setBased {
			waves = hotWaves(msgs, hotIdx, moved)
		} else {
			for _, i := range hotIdx {
				waves = append(waves, []int{i})
			}
		}
		for _, wave := range waves {
			if len(wave) == 1 {
				if err := s.ingestHotOne(ctx, tx, msgs[wave[0]], &orders[wave[0]], now, w, sendCold, readCold, &res[wave[0]]); err != nil {
					return err
				}
			} else if err := s.ingestWave(ctx, tx, msgs, orders, wave, now, w, sendCold, readCold, res); err != nil {
				return err
			}
			for _, i := range wave {
				if err := planPatients(orders[i], plan); err != nil {
					return err
				}
				if err := w.add(i, msgs[i], orders[i], &res[i]); err != nil {
					return err
				}
			}
		}

		// The last round trip: every collected write, one statement per
		// table (and per repeated key: groupWrites).
		b = &pgx.Batch{}
		coldNow := sendCold(b)
		q := w.queue(b)
		if b.Len() > 0 {
			br, err := sendBatch(ctx, tx, b, coldNow, readCold)
			if err != nil {
				return err
			}
			if err := w.read(br, q, res); err != nil {
				br.Close()
				return err
			}
			if err := br.Close(); err != nil {
				return fmt.Errorf("store group: %w", err)
			}
		}
		if coldStored >= 0 {
			if err := guardSkipped(ctx, tx, coldStored, coldArgs); err != nil {
				return err
			}
		}
		return s.countCold(ctx, tx, msgs, fresh, cold, coldStored, coldFacts, coldKeys, coldInbox, res)
	})
	if err != nil {
		return err
	}
	for i := range msgs {
		out[i].IngestResult = res[i]
		if !fresh[i] {
			out[i].Err = consumer.ErrDuplicate
		}
	}
	return nil
}

// countCold fills in the facts each cold message stored.
func (s *Store) countCold(ctx context.Context, tx pgx.Tx, msgs []consumer.Message, fresh, cold []bool, stored, given int,
	keys, inbox []string, res []consumer.IngestResult) error {
	if stored < 0 {
		return nil
	}
	counts, err := storedCounts(ctx, tx, stored, given, keys, inbox)
	if err != nil {
		return err
	}
	for i, m := range msgs {
		if fresh[i] && cold[i] && len(m.Facts) > 0 {
			res[i].Facts = factsStored(m, counts)
		}
	}
	return nil
}

// storedCounts counts the facts each message of a multi-message insert
// stored (countFactsSQL), by inbox key; nil when the insert stored as many
// rows as it was given, so each message stored all of its facts.
func storedCounts(ctx context.Context, tx pgx.Tx, stored, given int, keys, inbox []string) (map[string]int, error) {
	if stored == given {
		return nil, nil
	}
	counts := map[string]int{}
	rows, err := tx.Query(ctx, countFactsSQL, keys, inbox)
	if err != nil {
		return nil, fmt.Errorf("count facts: %w", err)
	}
	var k string
	var c int
	if _, err := pgx.ForEachRow(rows, []any{&k, &c}, func() error { counts[k] = c; return nil }); err != nil {
		return nil, fmt.Errorf("count facts: %w", err)
	}
	return counts, nil
}

// factsStored is how many of m's facts its group's insert stored.
func factsStored(m consumer.Message, counts map[string]int) int {
	if counts == nil {
		return len(m.Facts)
	}
	return counts[m.InboxKey]
}

// ingestHotOne stores one hot message's facts and loads its snapshots, as
// Ingest does (the cold facts of the group travel with it when not yet
// stored).
func (s *Store) ingestHotOne(ctx context.Context, tx pgx.Tx, msg consumer.Message, order *[]*patientPlan, now time.Time, w *groupWrites,
	sendCold func(*pgx.Batch) bool, readCold func(pgx.BatchResults) error, res *consumer.IngestResult) error {
	b := &pgx.Batch{}
	coldNow := sendCold(b)
	factArgs := s.queueInput(b, msg, *order, now, w)
	if b.Len() == 0 {
		return nil
	}
	br, err := sendBatch(ctx, tx, b, coldNow, readCold)
	if err != nil {
		return err
	}
	others, err := readInput(br, msg, *order, res)
	if err != nil {
		br.Close()
		return err
	}
	if err := br.Close(); err != nil {
		return fmt.Errorf("store group: %w", err)
	}
	if err := guardSkipped(ctx, tx, res.Facts, factArgs); err != nil {
		return err
	}
	if err := s.loadSnapshots(ctx, tx, msg, *order, w); err != nil {
		return err
	}
	if len(others) > 0 {
		moved, err := s.loadMoved(ctx, tx, msg, others, w)
		if err != nil {
			return err
		}
		*order = append(*order, moved...)
	}
	return nil
}

// ingestWave stores the facts of a wave of hot messages (hotWaves) in one
// insert, with every message's lookups in the same round trip, and loads
// their snapshots in one more.
func (s *Store) ingestWave(ctx context.Context, tx pgx.Tx, msgs []consumer.Message, orders [][]*patientPlan, wave []int, now time.Time,
	w *groupWrites, sendCold func(*pgx.Batch) bool, readCold func(pgx.BatchResults) error, res []consumer.IngestResult) error {
	b := &pgx.Batch{}
	coldNow := sendCold(b)
	var lists [][]any
	var given int
	var keys, inbox []string
	for _, i := range wave {
		if m := msgs[i]; len(m.Facts) > 0 {
			lists = append(lists, s.factArgs(m, now))
			given += len(m.Facts)
			keys, inbox = append(keys, factKeys(m)...), append(inbox, m.InboxKey)
		}
	}
	args, err := concatArgs(lists)
	if err != nil {
		return err
	}
	if args != nil {
		b.Queue(insertFactsSQL, args...)
	}
	for _, i := range wave {
		s.queueLookups(b, msgs[i], orders[i], w)
	}
	if b.Len() == 0 {
		return nil
	}
	br, err := sendBatch(ctx, tx, b, coldNow, readCold)
	if err != nil {
		return err
	}
	stored := 0
	if args != nil {
		tag, err := br.Exec()
		if err != nil {
			br.Close()
			return fmt.Errorf("insert facts: %w", err)
		}
		stored = int(tag.RowsAffected())
	}
	for _, i := range wave {
		others, err := readLookups(br, msgs[i], orders[i])
		if err != nil {
			br.Close()
			return err
		}
		if len(others) > 0 {
			// hotWaves keeps a message of a moved fact out of waves.
			br.Close()
			return errors.New("group ingest: a message of a wave moves a fact")
		}
	}
	if err := br.Close(); err != nil {
		return fmt.Errorf("store group: %w", err)
	}
	if err := guardSkipped(ctx, tx, stored, args); err != nil {
		return err
	}
	counts, err := storedCounts(ctx, tx, stored, given, keys, inbox)
	if err != nil {
		return err
	}
	for _, i := range wave {
		if m := msgs[i]; len(m.Facts) > 0 {
			res[i].Facts = factsStored(m, counts)
		}
	}
	wm, wo := make([]consumer.Message, len(wave)), make([][]*patientPlan, len(wave))
	for j, i := range wave {
		wm[j], wo[j] = msgs[i], orders[i]
	}
	return s.loadSnapshotsOf(ctx, tx, wm, wo, w)
}

// sendBatch sends b and, when the group's cold facts travel in it
// (coldNow: sendCold queued them first), reads their results, so that the
// caller reads its own statements' results next.
func sendBatch(ctx context.Context, tx pgx.Tx, b *pgx.Batch, coldNow bool, readCold func(pgx.BatchResults) error) (pgx.BatchResults, error) {
	br := tx.SendBatch(ctx, b)
	if coldNow {
		if err := readCold(br); err != nil {
			br.Close()
			return nil, err
		}
	}
	return br, nil
}
