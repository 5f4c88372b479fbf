package postgres

// TranslateForTest exposes translate to the external tests.
func TranslateForTest(op string, err error) error { return translate(op, err, false) }

var ConcatArgs = concatArgs

// CachedLookups is the number of term and encounter ids the Store caches.
func (s *Store) CachedLookups() (terms, encounters int) { return s.lookups.size() }
