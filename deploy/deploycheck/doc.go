// Package deploycheck is a test-only module: its tests parse the YAML
// Kubernetes manifests in ../kubernetes with a YAML library the service's
// own module does not need, and check them against the service's settings
// (package deploy). Run with: cd deploy/deploycheck && go test ./...
package deploycheck
