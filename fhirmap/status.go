package fhirmap

// Usable reports whether a value with this status may feed a derivation:
// final, amended, corrected and preliminary are usable (a derivation from a
// preliminary input is itself preliminary, see doc.go); registered (no result
// yet), unknown, cancelled and entered-in-error are not.
func (s Status) Usable() bool {
	switch s {
	case StatusFinal, StatusAmended, StatusCorrected, StatusPreliminary:
		return true
	}
	return false
}

// Retracts reports whether this status withdraws an earlier version of the
// same fact: cancelled and entered-in-error. Derivations made from a
// retracted fact must be withdrawn too.
func (s Status) Retracts() bool {
	return s == StatusCancelled || s == StatusEnteredInError
}

// valid reports whether s is one of the eight FHIR R4 Observation.status codes.
func (s Status) valid() bool { return s.rank() >= 0 }

// rank orders statuses for Current when versions and times cannot decide:
// a later step in an Observation's life wins. entered-in-error > cancelled >
// corrected > amended > final > preliminary > registered > unknown; -1 for
// a code outside FHIR R4.
func (s Status) rank() int {
	switch s {
	case StatusEnteredInError:
		return 7
	case StatusCancelled:
		return 6
	case StatusCorrected:
		return 5
	case StatusAmended:
		return 4
	case StatusFinal:
		return 3
	case StatusPreliminary:
		return 2
	case StatusRegistered:
		return 1
	case StatusUnknown:
		return 0
	}
	return -1
}
