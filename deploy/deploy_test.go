package deploy

import (
	"bytes"
	"context"
	"encoding/json"
	"flag"
	"net/http"
	"net/http/httptest"
	"os"
	"path/filepath"
	"reflect"
	"regexp"
	"slices"
	"strconv"
	"testing"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"
	"github.com/prometheus/client_golang/prometheus"

	"github.com/ventderive/ventderive/consumer"
	"github.com/ventderive/ventderive/fhirmap"
)

var update = flag.Bool("update", false, "rewrite the generated deployment files (stream definitions, CodeSystem) from the service's definitions")

// writeOrRead writes want to path under -update; it returns the file's bytes.
func writeOrRead(t *testing.T, path string, want []byte) []byte {
	t.Helper()
	if *update {
		if err := os.WriteFile(path, want, 0o644); err != nil {
			t.Fatalf("update %s: %v", path, err)
		}
	}
	got, err := os.ReadFile(path)
	if err != nil {
		t.Fatalf("read %s (run with -update to create it): %v", path, err)
	}
	return got
}

// indentJSON is v as indented JSON, with ">" left readable.
func indentJSON(t *testing.T, v any) []byte {
	t.Helper()
	var b bytes.Buffer
	enc := json.NewEncoder(&b)
	enc.SetEscapeHTML(false)
	enc.SetIndent("", "  ")
	if err := enc.Encode(v); err != nil {
		t.Fatalf("marshal: %v", err)
	}
	return b.Bytes()
}

// strictJSON decodes b into v, refusing unknown fields (a misspelt field
// would otherwise be dropped silently by the nats CLI as well).
func strictJSON(t *testing.T, name string, b []byte, v any) {
	t.Helper()
	d := json.NewDecoder(bytes.NewReader(b))
	d.DisallowUnknownFields()
	if err := d.Decode(v); err != nil {
		t.Fatalf("%s: %v", name, err)
	}
}

// startJetStream runs an in-process nats-server with JetStream on a free port.
func startJetStream(t *testing.T, o *server.Options) *server.Server {
	t.Helper()
	if o == nil {
		o = &server.Options{Host: "127.0.0.1", Port: -1, JetStream: true}
	}
	o.StoreDir, o.NoLog, o.NoSigs = t.TempDir(), true, true
	s, err := server.NewServer(o)
	if err != nil {
		t.Fatalf("nats server: %v", err)
	}
	go s.Start()
	if !s.ReadyForConnections(10 * time.Second) {
		s.Shutdown()
		t.Fatal("nats server not ready in 10s")
	}
	t.Cleanup(func() { s.Shutdown(); s.WaitForShutdown() })
	return s
}

var (
	inputStreamFile  = filepath.Join("nats", "streams", "input-stream.json")
	outputStreamFile = filepath.Join("nats", "streams", "output-stream.json")
	consumerFile     = filepath.Join("nats", "streams", "consumer.json")
	freshFile        = filepath.Join("nats", "streams", "fresh-consumer.json")
)

func loadStreams(t *testing.T) (in, out jetstream.StreamConfig, cons jetstream.ConsumerConfig) {
	t.Helper()
	strictJSON(t, inputStreamFile, writeOrRead(t, inputStreamFile, indentJSON(t, consumer.InputStreamConfig(""))), &in)
	strictJSON(t, outputStreamFile, writeOrRead(t, outputStreamFile, indentJSON(t, consumer.OutputStreamConfig())), &out)
	strictJSON(t, consumerFile, writeOrRead(t, consumerFile, indentJSON(t, consumer.ConsumerConfig(consumer.DefaultConfig()))), &cons)
	return in, out, cons
}

// loadFresh reads (or with -update writes) the fresh lane's consumer.
func loadFresh(t *testing.T) (fresh jetstream.ConsumerConfig) {
	t.Helper()
	strictJSON(t, freshFile, writeOrRead(t, freshFile, indentJSON(t, consumer.FreshConsumerConfig(consumer.DefaultConfig()))), &fresh)
	return fresh
}

// TestStreamDefinitions checks that the JSON definitions equal the
// service's, and that a JetStream server takes them as the same definitions
// (creating an existing stream or consumer succeeds only when the
// configuration is identical).
func TestStreamDefinitions(t *testing.T) {
	in, out, cons := loadStreams(t)
	fresh := loadFresh(t)
	for _, c := range []struct {
		name      string
		got, want any
	}{
		{"input_stream", in, consumer.InputStreamConfig("")},
		{"output_stream", out, consumer.OutputStreamConfig()},
		{"durable_consumer", cons, consumer.ConsumerConfig(consumer.DefaultConfig())},
		{"fresh_consumer", fresh, consumer.FreshConsumerConfig(consumer.DefaultConfig())},
	} {
		t.Run(c.name, func(t *testing.T) {
			if !reflect.DeepEqual(c.got, c.want) {
				t.Errorf("file differs from the service's definition:\nfile %+v\nwant %+v", c.got, c.want)
			}
		})
	}

	t.Run("server_accepts_as_identical", func(t *testing.T) {
		s := startJetStream(t, nil)
		nc, err := nats.Connect(s.ClientURL())
		if err != nil {
			t.Fatalf("connect: %v", err)
		}
		defer nc.Close()
		js, err := jetstream.New(nc)
		if err != nil {
			t.Fatalf("jetstream: %v", err)
		}
		ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
		defer cancel()
		for _, pair := range [][2]jetstream.StreamConfig{{in, consumer.InputStreamConfig("")}, {out, consumer.OutputStreamConfig()}} {
			if _, err := js.CreateStream(ctx, pair[0]); err != nil {
				t.Fatalf("create %s from file: %v", pair[0].Name, err)
			}
			if _, err := js.CreateStream(ctx, pair[1]); err != nil {
				t.Errorf("service definition of %s differs from the file's on the server: %v", pair[1].Name, err)
			}
		}
		if _, err := js.CreateConsumer(ctx, in.Name, cons); err != nil {
			t.Fatalf("create consumer from file: %v", err)
		}
		if _, err := js.CreateConsumer(ctx, in.Name, consumer.ConsumerConfig(consumer.DefaultConfig())); err != nil {
			t.Errorf("service consumer differs from the file's on the server: %v", err)
		}
		if _, err := js.CreateConsumer(ctx, in.Name, fresh); err != nil {
			t.Fatalf("create fresh-lane consumer from file: %v", err)
		}
		if _, err := js.CreateConsumer(ctx, in.Name, consumer.FreshConsumerConfig(consumer.DefaultConfig())); err != nil {
			t.Errorf("service fresh-lane consumer differs from the file's on the server: %v", err)
		}
	})
}

// TestCodeAliasesExample loads the example alias file with the service's
// loader and checks that every alias resolves to what it says.
func TestCodeAliasesExample(t *testing.T) {
	const path = "sites/code-aliases.example.jsonl"
	raw, err := os.ReadFile(path)
	if err != nil {
		t.Fatalf("read: %v", err)
	}
	table, err := fhirmap.DefaultCodes().WithAliases(bytes.NewReader(raw))
	if err != nil {
		t.Fatalf("service loader refuses %s: %v", path, err)
	}
	n := 0
	for _, line := range bytes.Split(raw, []byte("\n")) {
		line = bytes.TrimSpace(line)
		if len(line) == 0 || line[0] == '#' {
			continue
		}
		n++
		var a fhirmap.Alias
		strictJSON(t, path, line, &a)
		got, ok := table.Lookup(a.System, a.Code)
		if !ok {
			t.Errorf("%s|%s not in the table", a.System, a.Code)
			continue
		}
		if a.Maps != "" {
			want, _ := fhirmap.DefaultCodes().Lookup(fhirmap.LOINCSystem, a.Maps)
			if got.Quantity != want.Quantity || got.Specimen != want.Specimen || got.Origin != want.Origin {
				t.Errorf("%s maps to %s but means %s/%s/%s", a.Code, a.Maps, got.Quantity, got.Specimen, got.Origin)
			}
		} else if got.Quantity != a.Quantity {
			t.Errorf("%s: quantity %s, want %s", a.Code, got.Quantity, a.Quantity)
		}
	}
	if n == 0 || table.Len() != fhirmap.DefaultCodes().Len()+n {
		t.Errorf("%d aliases, table grew from %d to %d", n, fhirmap.DefaultCodes().Len(), table.Len())
	}
}

// TestCodeSystem checks that deploy/fhir/codesystem.json is the service's
// CodeSystem for the default site (indented here for review; compared
// compacted). -update regenerates it.
func TestCodeSystem(t *testing.T) {
	const path = "fhir/codesystem.json"
	gen, err := fhirmap.CodeSystem(fhirmap.DefaultSite())
	if err != nil {
		t.Fatalf("generate: %v", err)
	}
	var indented bytes.Buffer
	if err := json.Indent(&indented, gen, "", "  "); err != nil {
		t.Fatalf("indent: %v", err)
	}
	indented.WriteByte('\n')
	file := writeOrRead(t, path, indented.Bytes())
	var a, b bytes.Buffer
	if err := json.Compact(&a, file); err != nil {
		t.Fatalf("%s: %v", path, err)
	}
	if err := json.Compact(&b, gen); err != nil {
		t.Fatalf("generated: %v", err)
	}
	if !bytes.Equal(a.Bytes(), b.Bytes()) {
		t.Errorf("%s differs from fhirmap.CodeSystem(DefaultSite()); review the change and run with -update", path)
	}
	var cs struct {
		ResourceType string `json:"resourceType"`
		URL          string `json:"url"`
	}
	if err := json.Unmarshal(file, &cs); err != nil || cs.ResourceType != "CodeSystem" || cs.URL != fhirmap.DefaultSite().CodeSystemURL {
		t.Errorf("resourceType %q url %q (%v)", cs.ResourceType, cs.URL, err)
	}
}

// TestHTTPPaths checks that the service's HTTP handler serves the paths the
// deployment files probe and scrape.
func TestHTTPPaths(t *testing.T) {
	mux, ok := (&consumer.Pipeline{}).Handler(prometheus.NewRegistry()).(*http.ServeMux)
	if !ok {
		t.Fatal("handler is not a ServeMux; check the paths another way")
	}
	for _, path := range []string{HealthPath, ReadyPath, MetricsPath} {
		_, pattern := mux.Handler(httptest.NewRequest(http.MethodGet, path, nil))
		if pattern != "GET "+path {
			t.Errorf("GET %s: matched %q", path, pattern)
		}
	}
	rec := httptest.NewRecorder()
	mux.ServeHTTP(rec, httptest.NewRequest(http.MethodGet, HealthPath, nil))
	if rec.Code != http.StatusOK {
		t.Errorf("GET %s: %d", HealthPath, rec.Code)
	}
}

// TestKubernetesConfigMapDefaults checks that the settings the ConfigMap
// spells out are still the service's defaults. The manifests are YAML; the
// full YAML checks live in the deploycheck module, this one reads only the
// flat `KEY: "value"` lines of ventderive-config.
func TestKubernetesConfigMapDefaults(t *testing.T) {
	raw, err := os.ReadFile(filepath.Join("kubernetes", "configmap.yaml"))
	if err != nil {
		t.Fatalf("read: %v", err)
	}
	got := map[string]string{}
	for _, m := range regexp.MustCompile(`(?m)^  ([A-Z_]+): "([^"]*)"$`).FindAllSubmatch(raw, -1) {
		got[string(m[1])] = string(m[2])
	}
	d := consumer.DefaultConfig()
	want := map[string]string{
		"VENTDERIVE_HTTP_ADDR":           DefaultHTTPAddr,
		"VENTDERIVE_INPUT_STREAM":        d.InputStream,
		"VENTDERIVE_DURABLE":             d.Durable,
		"VENTDERIVE_SUBJECT_OBSERVATION": d.ObservationSub,
		"VENTDERIVE_SUBJECT_PROVENANCE":  d.ProvenanceSub,
		"VENTDERIVE_SUBJECT_DEADLETTER":  d.DeadLetterSub,
		"VENTDERIVE_MAX_ACK_PENDING":     strconv.Itoa(d.MaxAckPending),
	}
	for k, v := range want {
		if got[k] != v {
			t.Errorf("%s: %q, service default %q", k, got[k], v)
		}
	}
	for k, v := range map[string]time.Duration{
		"VENTDERIVE_WINDOW_BEFORE": d.Window.Before, "VENTDERIVE_WINDOW_AFTER": d.Window.After, "VENTDERIVE_ACK_WAIT": d.AckWait,
	} {
		if g, err := time.ParseDuration(got[k]); err != nil || g != v {
			t.Errorf("%s: %q, service default %v", k, got[k], v)
		}
	}
	for k := range got {
		if !slices.Contains(KnownEnv, k) {
			t.Errorf("%s is not a setting of serve", k)
		}
	}
}
