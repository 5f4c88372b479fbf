package postgres

// TranslateForTest exposes translate to the external tests.
func TranslateForTest(op string, err error) error { return translate(op, err, false) }

var ConcatArgs = concatArgs

// CachedLookups is the number of term and encounter ids the Store caches.
func (s *Store) CachedLookups() (terms, encounters int) { return s.lookups.size() }

// WithoutLookupCache makes the Store resolve every term and encounter in
// SQL, for comparisons with the cache.
func (s *Store) WithoutLookupCache() { s.lookups = nil }

// WarmStatements are the statements WarmConn prepares and plans.
var WarmStatements = warmStatements

// SnapshotFactsKnownSQL is the snapshot statement of a hot reading
// (loadSnapshots).
var SnapshotFactsKnownSQL = snapshotFactsKnownSQL

// FactsMissingSQL is the collision guard run after an insert that skipped
// a fact (guardSkipped).
var FactsMissingSQL = factsMissingSQL
