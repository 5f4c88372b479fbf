package fhircheck

import (
	"fmt"
	"sync"

	"github.com/google/fhir/go/fhirversion"
	"github.com/google/fhir/go/jsonformat"
)

var (
	once   sync.Once
	parser *jsonformat.Unmarshaller
	perr   error
)

// Validate parses one FHIR R4 JSON resource (a Bundle included) with the
// validating R4 unmarshaller of github.com/google/fhir/go and returns its
// first error, naming the element at fault, or nil when the resource is
// valid. Times without a zone are read in UTC.
func Validate(resource []byte) error {
	once.Do(func() {
		parser, perr = jsonformat.NewUnmarshaller("UTC", fhirversion.R4)
	})
	if perr != nil {
		return fmt.Errorf("create r4 unmarshaller: %w", perr)
	}
	if _, err := parser.Unmarshal(resource); err != nil {
		return fmt.Errorf("fhir r4: %w", err)
	}
	return nil
}
