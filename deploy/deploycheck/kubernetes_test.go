package deploycheck

import (
	"bytes"
	"errors"
	"io"
	"net"
	"os"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"testing"
	"time"

	"gopkg.in/yaml.v3"

	"github.com/ventderive/ventderive/deploy"
)

const dir = "../kubernetes"

// The parts of the manifests the checks read; yaml.v3 ignores the rest.
type (
	meta struct {
		Name   string            `yaml:"name"`
		Labels map[string]string `yaml:"labels"`
	}
	object struct {
		APIVersion string            `yaml:"apiVersion"`
		Kind       string            `yaml:"kind"`
		Metadata   meta              `yaml:"metadata"`
		Data       map[string]string `yaml:"data"`
		StringData map[string]string `yaml:"stringData"`
		Spec       yaml.Node         `yaml:"spec"`
		file       string
	}
	selector struct {
		MatchLabels map[string]string `yaml:"matchLabels"`
	}
	probe struct {
		HTTPGet struct {
			Path string `yaml:"path"`
			Port string `yaml:"port"`
		} `yaml:"httpGet"`
	}
	envFrom struct {
		ConfigMapRef *struct{ Name string } `yaml:"configMapRef"`
		SecretRef    *struct{ Name string } `yaml:"secretRef"`
	}
	container struct {
		Name  string   `yaml:"name"`
		Image string   `yaml:"image"`
		Args  []string `yaml:"args"`
		Ports []struct {
			Name          string `yaml:"name"`
			ContainerPort int    `yaml:"containerPort"`
		} `yaml:"ports"`
		Env []struct {
			Name string `yaml:"name"`
		} `yaml:"env"`
		EnvFrom      []envFrom `yaml:"envFrom"`
		VolumeMounts []struct {
			Name      string `yaml:"name"`
			MountPath string `yaml:"mountPath"`
		} `yaml:"volumeMounts"`
		LivenessProbe  *probe `yaml:"livenessProbe"`
		ReadinessProbe *probe `yaml:"readinessProbe"`
		Resources      struct {
			Requests map[string]string `yaml:"requests"`
			Limits   map[string]string `yaml:"limits"`
		} `yaml:"resources"`
		SecurityContext *struct {
			AllowPrivilegeEscalation *bool `yaml:"allowPrivilegeEscalation"`
			ReadOnlyRootFilesystem   *bool `yaml:"readOnlyRootFilesystem"`
			RunAsNonRoot             *bool `yaml:"runAsNonRoot"`
			Capabilities             struct {
				Drop []string `yaml:"drop"`
			} `yaml:"capabilities"`
		} `yaml:"securityContext"`
	}
	podTemplate struct {
		Metadata meta `yaml:"metadata"`
		Spec     struct {
			RestartPolicy                 string `yaml:"restartPolicy"`
			TerminationGracePeriodSeconds *int   `yaml:"terminationGracePeriodSeconds"`
			SecurityContext               struct {
				RunAsNonRoot *bool `yaml:"runAsNonRoot"`
				RunAsUser    *int  `yaml:"runAsUser"`
			} `yaml:"securityContext"`
			Containers []container `yaml:"containers"`
			Volumes    []struct {
				Name      string                 `yaml:"name"`
				ConfigMap *struct{ Name string } `yaml:"configMap"`
				Secret    *struct {
					SecretName string `yaml:"secretName"`
				} `yaml:"secret"`
			} `yaml:"volumes"`
		} `yaml:"spec"`
	}
	deploymentSpec struct {
		Replicas *int        `yaml:"replicas"`
		Selector selector    `yaml:"selector"`
		Template podTemplate `yaml:"template"`
	}
	jobSpec struct {
		Template podTemplate `yaml:"template"`
	}
	serviceSpec struct {
		Selector map[string]string `yaml:"selector"`
		Ports    []struct {
			Port       int    `yaml:"port"`
			TargetPort string `yaml:"targetPort"`
		} `yaml:"ports"`
	}
	pdbSpec struct {
		MaxUnavailable *int     `yaml:"maxUnavailable"`
		MinAvailable   *int     `yaml:"minAvailable"`
		Selector       selector `yaml:"selector"`
	}
)

// manifests reads every YAML document of the manifests directory, except
// the kustomization, which it returns separately.
func manifests(t *testing.T) (objs []object, resources []string) {
	t.Helper()
	files, err := filepath.Glob(filepath.Join(dir, "*.yaml"))
	if err != nil || len(files) == 0 {
		t.Fatalf("no manifests in %s: %v", dir, err)
	}
	for _, f := range files {
		raw, err := os.ReadFile(f)
		if err != nil {
			t.Fatalf("read: %v", err)
		}
		if filepath.Base(f) == "kustomization.yaml" {
			var k struct {
				Kind      string   `yaml:"kind"`
				Resources []string `yaml:"resources"`
			}
			if err := yaml.Unmarshal(raw, &k); err != nil || k.Kind != "Kustomization" {
				t.Fatalf("%s: %v (kind %q)", f, err, k.Kind)
			}
			resources = k.Resources
			continue
		}
		dec := yaml.NewDecoder(bytes.NewReader(raw))
		for {
			var o object
			err := dec.Decode(&o)
			if errors.Is(err, io.EOF) {
				break
			}
			if err != nil {
				t.Fatalf("%s: %v", f, err)
			}
			if o.APIVersion == "" || o.Kind == "" || o.Metadata.Name == "" {
				t.Fatalf("%s: document without apiVersion, kind or metadata.name", f)
			}
			o.file = filepath.Base(f)
			objs = append(objs, o)
		}
	}
	return objs, resources
}

func find(t *testing.T, objs []object, kind, name string) object {
	t.Helper()
	for _, o := range objs {
		if o.Kind == kind && o.Metadata.Name == name {
			return o
		}
	}
	t.Fatalf("no %s %s", kind, name)
	return object{}
}

func spec[T any](t *testing.T, o object) T {
	t.Helper()
	var s T
	if err := o.Spec.Decode(&s); err != nil {
		t.Fatalf("%s %s spec: %v", o.Kind, o.Metadata.Name, err)
	}
	return s
}

func isTrue(b *bool) bool { return b != nil && *b }

// matches reports whether every label of sel is on labels.
func matches(sel, labels map[string]string) bool {
	if len(sel) == 0 {
		return false
	}
	for k, v := range sel {
		if labels[k] != v {
			return false
		}
	}
	return true
}

// checkContainer checks what every container of the service must have.
func checkContainer(t *testing.T, c container, args string) {
	t.Helper()
	if strings.Join(c.Args, " ") != args {
		t.Errorf("container %s: args %q, want %q", c.Name, c.Args, args)
	}
	sc := c.SecurityContext
	if sc == nil || !isTrue(sc.ReadOnlyRootFilesystem) || !isTrue(sc.RunAsNonRoot) ||
		sc.AllowPrivilegeEscalation == nil || *sc.AllowPrivilegeEscalation || !slices.Contains(sc.Capabilities.Drop, "ALL") {
		t.Errorf("container %s: security context not non-root, read-only, no escalation, no capabilities", c.Name)
	}
	if c.Resources.Requests["cpu"] == "" || c.Resources.Requests["memory"] == "" || c.Resources.Limits["memory"] == "" {
		t.Errorf("container %s: resources %+v", c.Name, c.Resources)
	}
	for _, e := range c.Env {
		if !slices.Contains(deploy.KnownEnv, e.Name) {
			t.Errorf("container %s: env %s is not a setting of serve", c.Name, e.Name)
		}
	}
}

// envOf collects the environment a container gets through envFrom, and
// fails on references to objects the manifests do not define.
func envOf(t *testing.T, objs []object, c container) map[string]string {
	t.Helper()
	env := map[string]string{}
	for _, ef := range c.EnvFrom {
		var src map[string]string
		switch {
		case ef.ConfigMapRef != nil:
			src = find(t, objs, "ConfigMap", ef.ConfigMapRef.Name).Data
		case ef.SecretRef != nil:
			src = find(t, objs, "Secret", ef.SecretRef.Name).StringData
		}
		for k, v := range src {
			env[k] = v
		}
	}
	return env
}

func TestKubernetesManifests(t *testing.T) {
	objs, resources := manifests(t)

	t.Run("kustomization_lists_every_manifest", func(t *testing.T) {
		var files []string
		for _, o := range objs {
			if !slices.Contains(files, o.file) {
				files = append(files, o.file)
			}
		}
		if !slices.Equal(slices.Sorted(slices.Values(files)), slices.Sorted(slices.Values(resources))) {
			t.Errorf("kustomization resources %q, manifests %q", resources, files)
		}
	})

	dep := find(t, objs, "Deployment", "ventderive")
	ds := spec[deploymentSpec](t, dep)
	pod := ds.Template
	if len(pod.Spec.Containers) != 1 {
		t.Fatalf("%d containers", len(pod.Spec.Containers))
	}
	c := pod.Spec.Containers[0]
	env := envOf(t, objs, c)

	t.Run("deployment_replicas_at_least_2", func(t *testing.T) {
		if ds.Replicas == nil || *ds.Replicas < 2 {
			t.Fatalf("replicas missing or below 2")
		}
		if !matches(ds.Selector.MatchLabels, pod.Metadata.Labels) {
			t.Error("selector does not match the pod labels")
		}
	})
	t.Run("deployment_container_serve_hardened", func(t *testing.T) {
		checkContainer(t, c, "serve")
		if !isTrue(pod.Spec.SecurityContext.RunAsNonRoot) || pod.Spec.SecurityContext.RunAsUser == nil || *pod.Spec.SecurityContext.RunAsUser == 0 {
			t.Error("pod security context not non-root")
		}
	})
	t.Run("env_names_known_and_secrets_in_secret", func(t *testing.T) {
		for k := range env {
			if !slices.Contains(deploy.KnownEnv, k) {
				t.Errorf("%s is not a setting of serve", k)
			}
		}
		for _, s := range deploy.SecretEnv {
			if _, ok := env[s]; !ok {
				t.Errorf("%s not provided", s)
			}
			for _, o := range objs {
				if _, inCM := o.Data[s]; o.Kind == "ConfigMap" && inCM {
					t.Errorf("secret %s in ConfigMap %s", s, o.Metadata.Name)
				}
			}
		}
		for _, o := range objs {
			for k, v := range o.StringData {
				if o.Kind == "Secret" && !strings.Contains(v, "REPLACE") {
					t.Errorf("Secret %s key %s holds a value, not a placeholder", o.Metadata.Name, k)
				}
			}
		}
	})
	t.Run("probes_and_port_equal_the_service", func(t *testing.T) {
		addr := env["VENTDERIVE_HTTP_ADDR"]
		if addr == "" {
			addr = deploy.DefaultHTTPAddr
		}
		_, portText, err := net.SplitHostPort(addr)
		if err != nil {
			t.Fatalf("VENTDERIVE_HTTP_ADDR %q: %v", addr, err)
		}
		port, _ := strconv.Atoi(portText)
		named := map[string]int{}
		for _, p := range c.Ports {
			named[p.Name] = p.ContainerPort
		}
		for _, pr := range []struct {
			name string
			p    *probe
			path string
		}{{"liveness", c.LivenessProbe, deploy.HealthPath}, {"readiness", c.ReadinessProbe, deploy.ReadyPath}} {
			if pr.p == nil || pr.p.HTTPGet.Path != pr.path || named[pr.p.HTTPGet.Port] != port {
				t.Errorf("%s probe %+v, want %s on port %d", pr.name, pr.p, pr.path, port)
			}
		}
		svc := find(t, objs, "Service", "ventderive-metrics")
		ss := spec[serviceSpec](t, svc)
		if !matches(ss.Selector, pod.Metadata.Labels) || len(ss.Ports) != 1 || named[ss.Ports[0].TargetPort] != port {
			t.Errorf("metrics Service %+v does not reach port %d of the pods", ss, port)
		}
	})
	t.Run("mounted_files_where_the_env_says", func(t *testing.T) {
		mounts := map[string]string{} // volume -> path
		for _, m := range c.VolumeMounts {
			mounts[m.Name] = m.MountPath
		}
		files := map[string]bool{}
		for _, v := range pod.Spec.Volumes {
			if v.ConfigMap == nil {
				continue
			}
			for key := range find(t, objs, "ConfigMap", v.ConfigMap.Name).Data {
				files[filepath.Join(mounts[v.Name], key)] = true
			}
		}
		for _, k := range []string{"VENTDERIVE_NATS_TLS_CA", "VENTDERIVE_CODE_ALIASES"} {
			if p := env[k]; p != "" && !files[p] {
				t.Errorf("%s=%s is not a mounted file (mounted: %v)", k, p, files)
			}
		}
	})
	t.Run("graceful_stop_longer_than_ack_wait", func(t *testing.T) {
		ack, err := time.ParseDuration(env["VENTDERIVE_ACK_WAIT"])
		if err != nil {
			t.Fatalf("VENTDERIVE_ACK_WAIT: %v", err)
		}
		if g := pod.Spec.TerminationGracePeriodSeconds; g == nil || time.Duration(*g)*time.Second <= ack {
			t.Errorf("termination grace %v not above ack wait %v", g, ack)
		}
	})
	t.Run("pdb_keeps_two_replicas", func(t *testing.T) {
		ps := spec[pdbSpec](t, find(t, objs, "PodDisruptionBudget", "ventderive"))
		if !matches(ps.Selector.MatchLabels, pod.Metadata.Labels) {
			t.Error("PDB selector does not match the pods")
		}
		switch {
		case ps.MaxUnavailable != nil:
			if *ds.Replicas-*ps.MaxUnavailable < 2 {
				t.Errorf("maxUnavailable %d of %d replicas", *ps.MaxUnavailable, *ds.Replicas)
			}
		case ps.MinAvailable != nil:
			if *ps.MinAvailable < 2 {
				t.Errorf("minAvailable %d", *ps.MinAvailable)
			}
		default:
			t.Error("PDB without a budget")
		}
	})
	t.Run("migrate_job", func(t *testing.T) {
		js := spec[jobSpec](t, find(t, objs, "Job", "ventderive-migrate"))
		if len(js.Template.Spec.Containers) != 1 || js.Template.Spec.RestartPolicy != "Never" {
			t.Fatalf("job pod %+v", js.Template.Spec)
		}
		jc := js.Template.Spec.Containers[0]
		checkContainer(t, jc, "migrate")
		if jc.Image != c.Image {
			t.Errorf("job image %q differs from the service's %q", jc.Image, c.Image)
		}
		if _, ok := envOf(t, objs, jc)["DATABASE_URL"]; !ok {
			t.Error("job has no DATABASE_URL")
		}
		if matches(ds.Selector.MatchLabels, js.Template.Metadata.Labels) {
			t.Error("the Deployment's selector matches the Job's pods")
		}
	})
}
