// Package fhircheck validates the FHIR R4 resources that ventderive emits
// with an independent, general-purpose FHIR implementation: the R4 JSON
// parser of github.com/google/fhir/go (jsonformat), which checks every
// element name against the R4 structure definitions, cardinality and
// required elements, required-binding codes (such as Observation.status),
// primitive formats (ids, dateTimes, instants, decimals, URIs) and the
// target types of references.
//
// It is a separate, test-only module so that the service's own module does
// not depend on the validator and its protobuf dependencies. Run it with
//
//	cd fhirmap/fhircheck && go test ./...
//
// Its tests generate every kind of output through the fhirmap API (each
// derived value, a retraction, Provenance for first, later and retraction
// versions, OperationOutcome, Bundle and the CodeSystem), validate the golden
// files of fhirmap/testdata/encode and cmd/ventderive/testdata/derive, and
// prove that the check can fail with deliberately broken resources.
package fhircheck
