package postgres

// TranslateForTest exposes translate to the external tests.
func TranslateForTest(op string, err error) error { return translate(op, err, false) }

var ConcatArgs = concatArgs
