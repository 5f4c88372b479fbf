// Package deploy holds no code of the service: its tests check that every
// deployment file beside it (NATS streams and server configuration, systemd
// units, Kubernetes manifests, the site code-alias example, the service's
// CodeSystem) agrees with the service's own definitions.
//
// The Kubernetes manifests are YAML and are checked by the test-only module
// in deploycheck/, so that the service's module needs no YAML library.
package deploy

// KnownEnv lists the environment variables `ventderive serve` reads. The
// deployment files may set only these. Flags are the same names in lower
// case with dashes and without the VENTDERIVE_ prefix.
var KnownEnv = []string{
	"VENTDERIVE_NATS_URL",                  // NATS server URL(s); may carry user:password (then a secret)
	"VENTDERIVE_NATS_CREDS",                // file: NATS user JWT and seed (operator mode)
	"VENTDERIVE_NATS_TLS_CA",               // file: CA certificate of the NATS server
	"VENTDERIVE_NATS_TLS_CERT",             // file: client certificate for mutual TLS
	"VENTDERIVE_NATS_TLS_KEY",              // file: client key for mutual TLS
	"DATABASE_URL",                         // PostgreSQL URL (secret: carries the password)
	"VENTDERIVE_INPUT_STREAM",              // default consumer.DefaultInputStream
	"VENTDERIVE_DURABLE",                   // default consumer.DefaultDurable
	"VENTDERIVE_SUBJECT_OBSERVATION",       // default consumer.DefaultObservationSub
	"VENTDERIVE_SUBJECT_PROVENANCE",        // default consumer.DefaultProvenanceSub
	"VENTDERIVE_SUBJECT_DEADLETTER",        // default consumer.DefaultDeadLetterSub
	"VENTDERIVE_WINDOW_BEFORE",             // pairing window before a blood gas, Go duration
	"VENTDERIVE_WINDOW_AFTER",              // pairing window after a blood gas, Go duration
	"VENTDERIVE_APPARATUS_DEAD_SPACE_ML",   // site apparatus dead space, mL
	"VENTDERIVE_ANATOMIC_DEAD_SPACE",       // artificial-airway (default) or whole-airway
	"VENTDERIVE_TEMPERATURE_WINDOW_BEFORE", // body-temperature window before a blood gas, Go duration
	"VENTDERIVE_TEMPERATURE_WINDOW_AFTER",  // body-temperature window after a blood gas, Go duration
	"VENTDERIVE_TARGET_PACO2",              // site target PaCO2, mm[Hg]; unset: not configured
	"VENTDERIVE_CODE_ALIASES",              // file: the site's code aliases
	"VENTDERIVE_CODESYSTEM_URL",            // canonical URL of the service's CodeSystem
	"VENTDERIVE_PATIENT_HASH_KEY",          // secret: key of the patient hash in logs and lookups
	"VENTDERIVE_HTTP_ADDR",                 // default DefaultHTTPAddr
	"VENTDERIVE_LOG_LEVEL",                 // debug, info, warn, error
	"VENTDERIVE_ACK_WAIT",                  // consumer ack wait, Go duration
	"VENTDERIVE_MAX_ACK_PENDING",           // consumer max ack pending
	"VENTDERIVE_WORKERS",                   // messages handled at once per replica
	"VENTDERIVE_FRESH_AGE",                 // fresh lane's age limit, Go duration; negative: off
}

// SecretEnv are the entries of KnownEnv that carry secrets: deployment files
// take them from a secret store, never from a plain configuration file.
var SecretEnv = []string{"VENTDERIVE_NATS_URL", "DATABASE_URL", "VENTDERIVE_PATIENT_HASH_KEY"}

// The HTTP endpoints of serve, on VENTDERIVE_HTTP_ADDR.
const (
	DefaultHTTPAddr = ":8080"
	HealthPath      = "/healthz" // liveness: the process runs
	ReadyPath       = "/readyz"  // readiness: NATS and PostgreSQL reachable, consumer bound
	MetricsPath     = "/metrics" // Prometheus text format
)
