package postgres

import (
	"cmp"
	"context"
	"maps"
	"slices"
	"sync"

	"github.com/ventderive/ventderive/consumer"
	"github.com/ventderive/ventderive/fhirmap"
)

// lookupCache holds the ids of fact_term and fact_encounter rows
// (migration 0014) that the Store has read back committed, so that the
// fact insert can take a known term's and encounter's id as given instead
// of matching the term's twelve columns in SQL for every fact.
//
// An id enters the cache only from a read of committed rows, outside any
// ingest transaction (load, after a commit): an id a transaction inserted
// and then rolled back is never seen, so never cached. A value without an
// id goes to the insert as 0 and is resolved (or inserted) in SQL as
// before, racing replicas included (ON CONFLICT DO UPDATE returns the row a
// concurrent transaction committed first); it is noted as wanted and
// looked up once that transaction has committed. Lookup rows are never
// deleted (retention removes fact rows only), so a cached id stays valid.
type lookupCache struct {
	mu         sync.RWMutex
	terms      map[termKey]int32
	encounters map[string]int32
	// Values seen without an id since the last load, at most maxWanted.
	wantTerms      map[termKey]bool
	wantEncounters map[string]bool
	// subjects are the input subjects known committed in inbox_subject
	// (migration 0019): seedLookups commits a subject not among them.
	subjects map[string]bool
	// seedWarned are the subjects whose seed failure was logged at Warn,
	// at most maxWanted: a further failure for one is logged at Debug.
	seedWarned map[string]bool
}

// termKey is the value of a fact_term row: the columns of its unique
// constraint fact_term_values.
type termKey struct {
	quantity, origin, detail, specimen string
	tempCorrected                      bool
	unit, text, sourceUnit             string
	system, code, display, status      string
}

func termOf(f fhirmap.Fact) termKey {
	return termKey{string(f.Quantity), string(f.Origin), f.Detail, string(f.Specimen), f.TempCorrected, f.Unit, f.Text,
		f.SourceUnit, f.Code.System, f.Code.Code, f.Code.Display, string(f.Status)}
}

const (
	// maxCached bounds each map (a site has a few dozen terms and one
	// encounter per admission); past it, new values are resolved in SQL.
	maxCached = 100_000
	maxWanted = 256
)

func newLookupCache() *lookupCache {
	return &lookupCache{terms: map[termKey]int32{}, encounters: map[string]int32{},
		wantTerms: map[termKey]bool{}, wantEncounters: map[string]bool{}, subjects: map[string]bool{}, seedWarned: map[string]bool{}}
}

// ids returns the cached term and encounter ids of facts, 0 where none is
// cached, and notes the values without one as wanted. A nil cache (tests
// comparing with the SQL lookups alone) has none.
func (c *lookupCache) ids(facts []fhirmap.Fact) (terms, encounters []int32) {
	terms, encounters = make([]int32, len(facts)), make([]int32, len(facts))
	if c == nil {
		return terms, encounters
	}
	var missTerm []termKey
	var missEnc []string
	c.mu.RLock()
	for i, f := range facts {
		k := termOf(f)
		terms[i] = c.terms[k]
		if terms[i] == 0 {
			missTerm = append(missTerm, k)
		}
		encounters[i] = c.encounters[f.Encounter]
		if encounters[i] == 0 {
			missEnc = append(missEnc, f.Encounter)
		}
	}
	c.mu.RUnlock()
	if len(missTerm)+len(missEnc) > 0 {
		c.mu.Lock()
		for _, k := range missTerm {
			if len(c.wantTerms) < maxWanted {
				c.wantTerms[k] = true
			}
		}
		for _, e := range missEnc {
			if len(c.wantEncounters) < maxWanted {
				c.wantEncounters[e] = true
			}
		}
		c.mu.Unlock()
	}
	return terms, encounters
}

// size is the number of cached terms and encounters.
func (c *lookupCache) size() (terms, encounters int) {
	if c == nil {
		return 0, 0
	}
	c.mu.RLock()
	defer c.mu.RUnlock()
	return len(c.terms), len(c.encounters)
}

const (
	loadTermsSQL = `
SELECT t.id, t.quantity, t.origin, t.detail, t.specimen, t.temp_corrected, t.unit, t.text, t.source_unit,
    t.code_system, t.code, t.code_display, t.status
FROM unnest($1::text[], $2::text[], $3::text[], $4::text[], $5::boolean[], $6::text[], $7::text[], $8::text[],
    $9::text[], $10::text[], $11::text[], $12::text[])
    AS u(quantity, origin, detail, specimen, temp_corrected, unit, text, source_unit, code_system, code, code_display, status)
JOIN fact_term t ON ` + termMatchSQL

	loadEncountersSQL = `SELECT id, encounter FROM fact_encounter WHERE encounter = ANY($1::text[])`
)

// loadWanted looks the wanted values up among the committed rows (each
// query runs on its own on the pool, outside any transaction) and caches
// the ids found. Ingest and IngestBatch call it after they return, so a
// failure here costs only the cache: it is logged and the values are
// resolved in SQL meanwhile. A value not found yet (its inserting transaction has not
// committed, or rolled back) is wanted again when a fact next names it.
func (s *Store) loadWanted(ctx context.Context) {
	c := s.lookups
	if c == nil {
		return
	}
	c.mu.Lock()
	terms, encs := c.wantTerms, c.wantEncounters
	if len(terms)+len(encs) == 0 {
		c.mu.Unlock()
		return
	}
	c.wantTerms, c.wantEncounters = map[termKey]bool{}, map[string]bool{}
	c.mu.Unlock()

	foundTerms := map[termKey]int32{}
	if len(terms) > 0 {
		rows, err := s.pool.Query(ctx, loadTermsSQL, termArgs(slices.Collect(maps.Keys(terms)))...)
		if err != nil {
			s.log.Debug("load fact terms", "error", err)
			return
		}
		for rows.Next() {
			var id int32
			var k termKey
			if err := rows.Scan(&id, &k.quantity, &k.origin, &k.detail, &k.specimen, &k.tempCorrected, &k.unit, &k.text,
				&k.sourceUnit, &k.system, &k.code, &k.display, &k.status); err != nil {
				rows.Close()
				s.log.Debug("load fact terms", "error", err)
				return
			}
			foundTerms[k] = id
		}
		if rows.Err() != nil {
			s.log.Debug("load fact terms", "error", rows.Err())
			return
		}
	}
	foundEncs := map[string]int32{}
	if len(encs) > 0 {
		list := make([]string, 0, len(encs))
		for e := range encs {
			list = append(list, e)
		}
		rows, err := s.pool.Query(ctx, loadEncountersSQL, list)
		if err != nil {
			s.log.Debug("load fact encounters", "error", err)
			return
		}
		for rows.Next() {
			var id int32
			var e string
			if err := rows.Scan(&id, &e); err != nil {
				rows.Close()
				s.log.Debug("load fact encounters", "error", err)
				return
			}
			foundEncs[e] = id
		}
		if rows.Err() != nil {
			s.log.Debug("load fact encounters", "error", rows.Err())
			return
		}
	}
	c.mu.Lock()
	for k, id := range foundTerms {
		if len(c.terms) < maxCached {
			c.terms[k] = id
		}
	}
	for e, id := range foundEncs {
		if len(c.encounters) < maxCached {
			c.encounters[e] = id
		}
	}
	c.mu.Unlock()
}

const (
	seedTermsSQL = `
INSERT INTO fact_term (quantity, origin, detail, specimen, temp_corrected, unit, text, source_unit,
    code_system, code, code_display, status)
SELECT * FROM unnest($1::text[], $2::text[], $3::text[], $4::text[], $5::boolean[], $6::text[], $7::text[], $8::text[],
    $9::text[], $10::text[], $11::text[], $12::text[])
ON CONFLICT ON CONSTRAINT fact_term_values DO NOTHING`

	seedEncountersSQL = `
INSERT INTO fact_encounter (encounter) SELECT * FROM unnest($1::text[]) ON CONFLICT (encounter) DO NOTHING`

	seedSubjectsSQL = `
INSERT INTO inbox_subject (subject) SELECT * FROM unnest($1::text[]) ON CONFLICT (subject) DO NOTHING`
)

// seedLookups commits the terms and encounters of msgs that the cache
// does not hold, each in a statement of its own outside the group's
// transaction, and caches their ids. Inside a group's transaction a new
// term's row stays uncommitted until the whole group commits, and every
// other lane or replica inserting the same term waits on the unique index
// for that commit: on a new store the first blood gases of four lanes
// queued behind one another (33, 64, 98 ms for one fact insert in the
// paced bench). Committed first, the row is only vocabulary: a message
// that is then refused leaves a term or encounter row that no fact names
// (the dead letter keeps the message itself). Rows go in sorted order, so
// two replicas seeding the same values cannot deadlock. A failure (a
// value a lookup table's CHECK refuses) is left to the group's insert,
// which refuses the message as before. The input subjects (inbox_subject,
// migration 0019) are seeded the same way, so that a group bringing a new
// subject does not hold back another group's claim of it; the claim still
// inserts a subject it does not find.
func (s *Store) seedLookups(ctx context.Context, msgs []consumer.Message) {
	c := s.lookups
	if c == nil {
		return
	}
	s.seedSubjects(ctx, msgs)
	terms := map[termKey]bool{}
	encs := map[string]bool{}
	c.mu.RLock()
	for _, m := range msgs {
		for _, f := range m.Facts {
			if k := termOf(f); c.terms[k] == 0 {
				terms[k] = true
			}
			if c.encounters[f.Encounter] == 0 {
				encs[f.Encounter] = true
			}
		}
	}
	c.mu.RUnlock()
	if len(terms)+len(encs) == 0 {
		return
	}
	if len(encs) > 0 {
		list := slices.Sorted(maps.Keys(encs))
		if _, err := s.pool.Exec(ctx, seedEncountersSQL, list); err != nil {
			s.log.Debug("seed fact encounters", "error", err)
			return
		}
	}
	if len(terms) > 0 {
		keys := slices.SortedFunc(maps.Keys(terms), func(a, b termKey) int {
			return cmp.Or(cmp.Compare(a.quantity, b.quantity), cmp.Compare(a.origin, b.origin), cmp.Compare(a.detail, b.detail),
				cmp.Compare(a.specimen, b.specimen), boolCmp(a.tempCorrected, b.tempCorrected), cmp.Compare(a.unit, b.unit),
				cmp.Compare(a.text, b.text), cmp.Compare(a.sourceUnit, b.sourceUnit), cmp.Compare(a.system, b.system),
				cmp.Compare(a.code, b.code), cmp.Compare(a.display, b.display), cmp.Compare(a.status, b.status))
		})
		if _, err := s.pool.Exec(ctx, seedTermsSQL, termArgs(keys)...); err != nil {
			s.log.Debug("seed fact terms", "error", err)
			return
		}
	}
	c.mu.Lock()
	for k := range terms {
		c.wantTerms[k] = true
	}
	for e := range encs {
		c.wantEncounters[e] = true
	}
	c.mu.Unlock()
	s.loadWanted(ctx)
}

// seedSubjects commits the subjects of msgs not known committed, in sorted
// order, and notes them as known.
func (s *Store) seedSubjects(ctx context.Context, msgs []consumer.Message) {
	c := s.lookups
	var list []string
	c.mu.RLock()
	for _, m := range msgs {
		if m.Subject != "" && !c.subjects[m.Subject] { // "" is the claim's to refuse
			list = append(list, m.Subject)
		}
	}
	c.mu.RUnlock()
	if len(list) == 0 {
		return
	}
	slices.Sort(list)
	list = slices.Compact(list)
	if _, err := s.pool.Exec(ctx, seedSubjectsSQL, list); err != nil {
		// The claim still inserts the subject, inside the group's
		// transaction, so nothing is lost; but a lasting failure (a
		// missing grant) brings back the wait across groups that seeding
		// avoids. Warn once per subject; repeats at Debug.
		// Only SQLSTATE and constraint are logged (translate).
		err = translate("seed inbox subjects", err, false)
		if ctx.Err() != nil {
			s.log.Debug("seed inbox subjects", "subjects", list, "error", err)
			return
		}
		var fresh []string
		c.mu.Lock()
		for _, subj := range list {
			if !c.seedWarned[subj] && len(c.seedWarned) < maxWanted {
				c.seedWarned[subj] = true
				fresh = append(fresh, subj)
			}
		}
		c.mu.Unlock()
		if len(fresh) > 0 {
			s.log.Warn("seed inbox subjects failed: new subjects are inserted inside the group's transaction",
				"subjects", fresh, "error", err)
		} else {
			s.log.Debug("seed inbox subjects", "subjects", list, "error", err)
		}
		return
	}
	c.mu.Lock()
	for _, subj := range list {
		if len(c.subjects) < maxCached {
			c.subjects[subj] = true
		}
	}
	c.mu.Unlock()
}

func boolCmp(a, b bool) int {
	switch {
	case a == b:
		return 0
	case !a:
		return -1
	}
	return 1
}

// termArgs are the twelve column arrays of keys, in the order of the
// fact_term_values constraint (loadTermsSQL and seedTermsSQL).
func termArgs(keys []termKey) []any {
	n := len(keys)
	q, o, d, sp, u, tx, su, sy, co, di, st := mk(n), mk(n), mk(n), mk(n), mk(n), mk(n), mk(n), mk(n), mk(n), mk(n), mk(n)
	tc := make([]bool, n)
	for i, k := range keys {
		q[i], o[i], d[i], sp[i], tc[i], u[i], tx[i], su[i] = k.quantity, k.origin, k.detail, k.specimen, k.tempCorrected, k.unit, k.text, k.sourceUnit
		sy[i], co[i], di[i], st[i] = k.system, k.code, k.display, k.status
	}
	return []any{q, o, d, sp, tc, u, tx, su, sy, co, di, st}
}
