package deploy

import (
	"context"
	"crypto/ecdsa"
	"crypto/elliptic"
	"crypto/rand"
	"crypto/x509"
	"crypto/x509/pkix"
	"encoding/pem"
	"fmt"
	"math/big"
	"net"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"

	"github.com/ventderive/ventderive/consumer"
)

const natsConf = "nats/nats-server.conf"

// Users of nats-server.conf.
const (
	userService = "ventderive"
	userGateway = "fhir-gateway"
	userDeploy  = "ventderive-deploy"
)

// servicePublish is every subject the service publishes to, derived from
// the message contract (consumer/config.go) and the JetStream API subjects
// nats.go's jetstream package uses for what the service does.
func servicePublish() []string {
	in, dur, out := consumer.DefaultInputStream, consumer.DefaultDurable, consumer.DefaultOutputStream
	fresh := consumer.DefaultFreshDurable
	return []string{
		fmt.Sprintf("$JS.API.CONSUMER.CREATE.%s.%s", in, dur),   // create or update the durable
		fmt.Sprintf("$JS.API.CONSUMER.CREATE.%s.%s.>", in, dur), // the same with its filter subject
		fmt.Sprintf("$JS.API.CONSUMER.INFO.%s.%s", in, dur),     // watchdog
		fmt.Sprintf("$JS.API.CONSUMER.MSG.NEXT.%s.%s", in, dur), // Fetch
		fmt.Sprintf("$JS.ACK.%s.%s.>", in, dur),                 // ack, nak, term, in progress
		fmt.Sprintf("$JS.API.CONSUMER.CREATE.%s.%s", in, fresh), // the fresh lane's durable, likewise
		fmt.Sprintf("$JS.API.CONSUMER.CREATE.%s.%s.>", in, fresh),
		fmt.Sprintf("$JS.API.CONSUMER.INFO.%s.%s", in, fresh),
		fmt.Sprintf("$JS.API.CONSUMER.MSG.NEXT.%s.%s", in, fresh),
		fmt.Sprintf("$JS.ACK.%s.%s.>", in, fresh),
		"$JS.API.STREAM.INFO." + in,
		"$JS.API.STREAM.INFO." + out,
		consumer.DefaultObservationSub,
		consumer.DefaultProvenanceSub,
		consumer.DefaultDeadLetterSub,
	}
}

// testTLS writes a throwaway CA and a server certificate for 127.0.0.1 into
// dir as ca.crt, server.crt and server.key, the names nats-server.conf uses.
func testTLS(t *testing.T, dir string) {
	t.Helper()
	key := func() *ecdsa.PrivateKey {
		k, err := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
		if err != nil {
			t.Fatalf("key: %v", err)
		}
		return k
	}
	write := func(name, typ string, der []byte) {
		if err := os.WriteFile(filepath.Join(dir, name), pem.EncodeToMemory(&pem.Block{Type: typ, Bytes: der}), 0o600); err != nil {
			t.Fatalf("write %s: %v", name, err)
		}
	}
	caKey, srvKey := key(), key()
	now := time.Now()
	ca := &x509.Certificate{SerialNumber: big.NewInt(1), Subject: pkix.Name{CommonName: "test CA"},
		NotBefore: now.Add(-time.Hour), NotAfter: now.Add(time.Hour), IsCA: true, BasicConstraintsValid: true,
		KeyUsage: x509.KeyUsageCertSign}
	caDER, err := x509.CreateCertificate(rand.Reader, ca, ca, &caKey.PublicKey, caKey)
	if err != nil {
		t.Fatalf("ca: %v", err)
	}
	srv := &x509.Certificate{SerialNumber: big.NewInt(2), Subject: pkix.Name{CommonName: "127.0.0.1"},
		NotBefore: now.Add(-time.Hour), NotAfter: now.Add(time.Hour), IPAddresses: []net.IP{net.IPv4(127, 0, 0, 1)},
		DNSNames: []string{"localhost"}, KeyUsage: x509.KeyUsageDigitalSignature, ExtKeyUsage: []x509.ExtKeyUsage{x509.ExtKeyUsageServerAuth}}
	caCert, _ := x509.ParseCertificate(caDER)
	srvDER, err := x509.CreateCertificate(rand.Reader, srv, caCert, &srvKey.PublicKey, caKey)
	if err != nil {
		t.Fatalf("server cert: %v", err)
	}
	srvKeyDER, err := x509.MarshalECPrivateKey(srvKey)
	if err != nil {
		t.Fatalf("server key: %v", err)
	}
	write("ca.crt", "CERTIFICATE", caDER)
	write("server.crt", "CERTIFICATE", srvDER)
	write("server.key", "EC PRIVATE KEY", srvKeyDER)
}

// parseNATSConf parses nats-server.conf with the server's own parser, with
// the certificate and store paths moved to a temporary directory (the
// parser loads the certificates).
func parseNATSConf(t *testing.T) (*server.Options, string) {
	t.Helper()
	raw, err := os.ReadFile(natsConf)
	if err != nil {
		t.Fatalf("read: %v", err)
	}
	dir := t.TempDir()
	testTLS(t, dir)
	text := strings.ReplaceAll(string(raw), "/etc/nats/tls/", dir+"/")
	text = strings.ReplaceAll(text, "/var/lib/nats/jetstream", filepath.Join(dir, "js"))
	if text == string(raw) {
		t.Fatal("no paths to move: the test and the file disagree")
	}
	path := filepath.Join(dir, "nats-server.conf")
	if err := os.WriteFile(path, []byte(text), 0o600); err != nil {
		t.Fatalf("write: %v", err)
	}
	opts, err := server.ProcessConfigFile(path)
	if err != nil {
		t.Fatalf("nats-server config parser: %v", err)
	}
	return opts, dir
}

func userOf(t *testing.T, opts *server.Options, name string) *server.User {
	t.Helper()
	for _, u := range opts.Users {
		if u.Username == name {
			return u
		}
	}
	t.Fatalf("no user %q", name)
	return nil
}

func sameSet(a, b []string) bool {
	return slices.Equal(slices.Sorted(slices.Values(a)), slices.Sorted(slices.Values(b)))
}

func TestNATSServerConfig(t *testing.T) {
	opts, _ := parseNATSConf(t)
	t.Run("jetstream_sync_always_tls", func(t *testing.T) {
		// sync_interval: always, for acknowledged writes that survive power
		// loss on a single node (Jepsen NATS 2.12.1; reference/reliability.md).
		if !opts.JetStream || !opts.SyncAlways {
			t.Errorf("jetstream %v, sync always %v", opts.JetStream, opts.SyncAlways)
		}
		if opts.TLSConfig == nil {
			t.Error("no TLS")
		}
		if want := consumer.InputStreamConfig("").MaxMsgSize; opts.MaxPayload != want {
			t.Errorf("max_payload %d, streams take %d", opts.MaxPayload, want)
		}
	})
	t.Run("no_plaintext_passwords", func(t *testing.T) {
		if len(opts.Users) != 3 {
			t.Fatalf("%d users, want service, gateway and deploy", len(opts.Users))
		}
		for _, u := range opts.Users {
			if !strings.HasPrefix(u.Password, "$2a$") || u.Account == nil || u.Account.Name != "FHIR" {
				t.Errorf("user %s: password is not a bcrypt hash or account is not FHIR", u.Username)
			}
		}
	})
	t.Run("service_permissions_exactly_its_subjects", func(t *testing.T) {
		p := userOf(t, opts, userService).Permissions
		if p == nil || p.Publish == nil || p.Subscribe == nil {
			t.Fatal("no permissions")
		}
		if !sameSet(p.Publish.Allow, servicePublish()) || len(p.Publish.Deny) != 0 {
			t.Errorf("publish allow %q deny %q\nwant allow %q", p.Publish.Allow, p.Publish.Deny, servicePublish())
		}
		if !sameSet(p.Subscribe.Allow, []string{"_INBOX.>"}) {
			t.Errorf("subscribe allow %q", p.Subscribe.Allow)
		}
	})
	t.Run("gateway_publishes_input_only", func(t *testing.T) {
		p := userOf(t, opts, userGateway).Permissions
		if !sameSet(p.Publish.Allow, []string{consumer.DefaultInputSubjects}) || !sameSet(p.Subscribe.Allow, []string{"_INBOX.>"}) {
			t.Errorf("publish %q subscribe %q", p.Publish.Allow, p.Subscribe.Allow)
		}
	})
}

// TestNATSServerConfigEnforced runs a server from nats-server.conf (test
// passwords and certificates, a free port) and checks each identity can do
// its job and not more.
func TestNATSServerConfigEnforced(t *testing.T) {
	opts, dir := parseNATSConf(t)
	for _, u := range opts.Users {
		u.Password = "test-password-" + u.Username
	}
	opts.Host, opts.Port, opts.HTTPPort = "127.0.0.1", -1, 0
	s := startJetStream(t, opts)

	connect := func(user string) *nats.Conn {
		t.Helper()
		nc, err := nats.Connect(s.ClientURL(), nats.UserInfo(user, "test-password-"+user),
			nats.RootCAs(filepath.Join(dir, "ca.crt")), nats.ErrorHandler(func(*nats.Conn, *nats.Subscription, error) {}))
		if err != nil {
			t.Fatalf("connect %s: %v", user, err)
		}
		t.Cleanup(nc.Close)
		return nc
	}
	jsOf := func(nc *nats.Conn) jetstream.JetStream {
		js, err := jetstream.New(nc, jetstream.WithDefaultTimeout(2*time.Second))
		if err != nil {
			t.Fatalf("jetstream: %v", err)
		}
		return js
	}
	ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
	defer cancel()
	short := func() context.Context {
		c, cancel := context.WithTimeout(ctx, time.Second)
		t.Cleanup(cancel)
		return c
	}

	deployJS := jsOf(connect(userDeploy))
	in, out, _ := loadStreams(t)
	for _, c := range []jetstream.StreamConfig{in, out} {
		if _, err := deployJS.CreateStream(ctx, c); err != nil {
			t.Fatalf("deploy identity creates %s: %v", c.Name, err)
		}
	}

	gatewayJS := jsOf(connect(userGateway))
	if _, err := gatewayJS.Publish(ctx, "fhir.input.lab", []byte(`{"resourceType":"Observation"}`), jetstream.WithMsgID("t-1")); err != nil {
		t.Fatalf("gateway publishes input: %v", err)
	}
	if _, err := gatewayJS.Publish(short(), consumer.DefaultObservationSub, []byte("{}")); err == nil {
		t.Error("gateway may publish service output")
	}

	serviceJS := jsOf(connect(userService))
	cons, err := serviceJS.CreateOrUpdateConsumer(ctx, consumer.DefaultInputStream, consumer.ConsumerConfig(consumer.DefaultConfig()))
	if err != nil {
		t.Fatalf("service creates its consumer: %v", err)
	}
	batch, err := cons.Fetch(1, jetstream.FetchMaxWait(2*time.Second))
	if err != nil {
		t.Fatalf("service fetches: %v", err)
	}
	got := 0
	for m := range batch.Messages() {
		got++
		if err := m.DoubleAck(ctx); err != nil {
			t.Errorf("service acks: %v", err)
		}
	}
	if got != 1 || batch.Error() != nil {
		t.Fatalf("service fetched %d messages (%v)", got, batch.Error())
	}
	if _, err := cons.Info(ctx); err != nil {
		t.Errorf("service reads consumer info: %v", err)
	}
	// The fresh lane's consumer (deliver new): created before the next
	// input, it pulls and acks it.
	fresh, err := serviceJS.CreateOrUpdateConsumer(ctx, consumer.DefaultInputStream, consumer.FreshConsumerConfig(consumer.DefaultConfig()))
	if err != nil {
		t.Fatalf("service creates its fresh-lane consumer: %v", err)
	}
	if _, err := gatewayJS.Publish(ctx, "fhir.input.lab", []byte(`{"resourceType":"Observation","id":"2"}`), jetstream.WithMsgID("t-2")); err != nil {
		t.Fatalf("gateway publishes input: %v", err)
	}
	fbatch, err := fresh.Fetch(1, jetstream.FetchMaxWait(2*time.Second))
	if err != nil {
		t.Fatalf("service fetches the fresh lane: %v", err)
	}
	got = 0
	for m := range fbatch.Messages() {
		got++
		if err := m.DoubleAck(ctx); err != nil {
			t.Errorf("service acks on the fresh lane: %v", err)
		}
	}
	if got != 1 || fbatch.Error() != nil {
		t.Fatalf("service fetched %d messages on the fresh lane (%v)", got, fbatch.Error())
	}
	if _, err := fresh.Info(ctx); err != nil {
		t.Errorf("service reads fresh-lane consumer info: %v", err)
	}
	for _, name := range []string{consumer.DefaultInputStream, consumer.DefaultOutputStream} {
		if _, err := serviceJS.Stream(ctx, name); err != nil {
			t.Errorf("service reads stream info of %s: %v", name, err)
		}
	}
	for _, subj := range []string{consumer.DefaultObservationSub, consumer.DefaultProvenanceSub, consumer.DefaultDeadLetterSub} {
		if _, err := serviceJS.Publish(ctx, subj, []byte("{}")); err != nil {
			t.Errorf("service publishes %s: %v", subj, err)
		}
	}
	if _, err := serviceJS.Publish(short(), "fhir.input.lab", []byte("{}")); err == nil {
		t.Error("service may publish input")
	}
	if _, err := serviceJS.CreateStream(short(), jetstream.StreamConfig{Name: "OTHER", Subjects: []string{"other.>"}}); err == nil {
		t.Error("service may create streams")
	}
	if _, err := serviceJS.CreateOrUpdateConsumer(short(), consumer.DefaultInputStream, jetstream.ConsumerConfig{Durable: "other"}); err == nil {
		t.Error("service may create other consumers")
	}

	// The deploy identity administers streams but cannot read patient data.
	st, err := deployJS.Stream(ctx, consumer.DefaultInputStream)
	if err != nil {
		t.Fatalf("deploy reads stream info: %v", err)
	}
	if _, err := st.GetMsg(short(), 1); err == nil {
		t.Error("deploy identity may read messages")
	}
}
