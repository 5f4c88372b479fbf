package fhirmap

import "testing"

// TestStatus follows FHIR R4 ObservationStatus (hl7.org/fhir/R4/valueset-observation-status):
// registered = no result yet; preliminary = verification pending;
// final/amended/corrected = complete; cancelled = unavailable;
// entered-in-error = should not have existed; unknown = cannot say.
func TestStatus(t *testing.T) {
	cases := []struct {
		s                Status
		usable, retracts bool
	}{
		{StatusRegistered, false, false},
		{StatusPreliminary, true, false},
		{StatusFinal, true, false},
		{StatusAmended, true, false},
		{StatusCorrected, true, false},
		{StatusCancelled, false, true},
		{StatusEnteredInError, false, true},
		{StatusUnknown, false, false},
		{Status("done"), false, false},
	}
	for _, c := range cases {
		t.Run(string(c.s), func(t *testing.T) {
			if c.s.Usable() != c.usable || c.s.Retracts() != c.retracts {
				t.Fatalf("Usable %v Retracts %v, want %v %v", c.s.Usable(), c.s.Retracts(), c.usable, c.retracts)
			}
			if c.s.valid() != (c.s != "done") {
				t.Fatal("valid disagrees with the FHIR R4 code list")
			}
		})
	}
	order := []Status{StatusUnknown, StatusRegistered, StatusPreliminary, StatusFinal, StatusAmended,
		StatusCorrected, StatusCancelled, StatusEnteredInError}
	for i := 1; i < len(order); i++ {
		if order[i-1].rank() >= order[i].rank() {
			t.Errorf("rank(%s) >= rank(%s)", order[i-1], order[i])
		}
	}
}
