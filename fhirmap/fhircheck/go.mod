module github.com/ventderive/ventderive/fhirmap/fhircheck

go 1.26.0

require (
	github.com/google/fhir/go v0.7.4
	github.com/ventderive/ventderive v0.0.0-00010101000000-000000000000
)

require (
	bitbucket.org/creachadair/stringset v0.0.9 // indirect
	github.com/golang/protobuf v1.5.4 // indirect
	github.com/google/uuid v1.6.0 // indirect
	github.com/json-iterator/go v1.1.10 // indirect
	github.com/modern-go/concurrent v0.0.0-20180306012644-bacd9c7ef1dd // indirect
	github.com/modern-go/reflect2 v1.0.2 // indirect
	github.com/pkg/errors v0.9.1 // indirect
	github.com/samply/golang-fhir-models/fhir-models v0.3.2 // indirect
	github.com/serenize/snaker v0.0.0-20201027110005-a7ad2135616e // indirect
	google.golang.org/protobuf v1.36.12 // indirect
)

replace github.com/ventderive/ventderive => ../..
