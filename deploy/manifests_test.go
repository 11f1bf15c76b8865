package deploy

import (
	"bytes"
	"fmt"
	"net"
	"os"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"testing"

	"go.yaml.in/yaml/v3"
	appsv1 "k8s.io/api/apps/v1"
	corev1 "k8s.io/api/core/v1"
	policyv1 "k8s.io/api/policy/v1"
	metav1 "k8s.io/apimachinery/pkg/apis/meta/v1"
	"k8s.io/apimachinery/pkg/labels"
	"sigs.k8s.io/kustomize/api/krusty"
	"sigs.k8s.io/kustomize/kyaml/filesys"
	sigsyaml "sigs.k8s.io/yaml"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/internal/calibration"
	"github.com/pulsefleet/pulsefleet/internal/shard"
)

// rendered is the kustomize output, decoded strictly into API types.
type rendered struct {
	sts       *appsv1.StatefulSet
	services  map[string]*corev1.Service
	configMap *corev1.ConfigMap
	pdb       *policyv1.PodDisruptionBudget
}

// render runs kustomize (the library behind `kustomize build`) on
// kubernetes/ and decodes each object with unknown fields as errors, so a
// misspelt or misplaced field fails here instead of being dropped by the
// API server.
func render(t *testing.T) rendered { t.Helper(); return renderDir(t, "kubernetes") }

// renderDir is render of another kustomization (an overlay).
func renderDir(t *testing.T, dir string) rendered {
	t.Helper()
	k := krusty.MakeKustomizer(krusty.MakeDefaultOptions())
	m, err := k.Run(filesys.MakeFsOnDisk(), dir)
	if err != nil {
		t.Fatalf("kustomize build: %v", err)
	}
	r := rendered{services: map[string]*corev1.Service{}}
	for _, res := range m.Resources() {
		y, err := res.AsYAML()
		if err != nil {
			t.Fatal(err)
		}
		var tm metav1.TypeMeta
		if err := sigsyaml.Unmarshal(y, &tm); err != nil {
			t.Fatal(err)
		}
		id := tm.APIVersion + "/" + tm.Kind + " " + res.GetName()
		strict := func(into any) {
			t.Helper()
			if err := sigsyaml.UnmarshalStrict(y, into); err != nil {
				t.Fatalf("%s does not decode strictly into the API type: %v", id, err)
			}
		}
		switch tm.APIVersion + "/" + tm.Kind {
		case "apps/v1/StatefulSet":
			if r.sts != nil {
				t.Fatalf("second StatefulSet %s", id)
			}
			r.sts = &appsv1.StatefulSet{}
			strict(r.sts)
		case "v1/Service":
			s := &corev1.Service{}
			strict(s)
			r.services[s.Name] = s
		case "v1/ConfigMap":
			if r.configMap != nil {
				t.Fatalf("second ConfigMap %s", id)
			}
			r.configMap = &corev1.ConfigMap{}
			strict(r.configMap)
		case "policy/v1/PodDisruptionBudget":
			r.pdb = &policyv1.PodDisruptionBudget{}
			strict(r.pdb)
		default:
			t.Fatalf("unexpected object %s", id)
		}
	}
	if r.sts == nil || r.configMap == nil || r.pdb == nil || len(r.services) != 2 {
		t.Fatalf("want a StatefulSet, a ConfigMap, a PodDisruptionBudget and 2 Services; got %+v", r)
	}
	return r
}

// The strict decoder is really strict: a misplaced field is an error.
func TestStrictDecodingRejectsUnknownFields(t *testing.T) {
	bad := []byte("apiVersion: apps/v1\nkind: StatefulSet\nmetadata: {name: x}\nspec:\n  replica: 3\n")
	if err := sigsyaml.UnmarshalStrict(bad, &appsv1.StatefulSet{}); err == nil || !strings.Contains(err.Error(), "replica") {
		t.Fatalf("spec.replica (for replicas) accepted: %v", err)
	}
}

func container(t *testing.T, sts *appsv1.StatefulSet) *corev1.Container {
	t.Helper()
	cs := sts.Spec.Template.Spec.Containers
	if len(cs) != 1 {
		t.Fatalf("%d containers, want 1", len(cs))
	}
	return &cs[0]
}

func portNamed(t *testing.T, c *corev1.Container, name string) int32 {
	t.Helper()
	for _, p := range c.Ports {
		if p.Name == name {
			return p.ContainerPort
		}
	}
	t.Fatalf("container has no port named %q", name)
	return 0
}

// serveConfig is the part of `serve --config` these checks read.
type serveConfig struct {
	GRPCListen string   `yaml:"grpc_listen"`
	HTTPListen string   `yaml:"http_listen"`
	Profile    string   `yaml:"profile"`
	Peers      []string `yaml:"peers"`
}

func listenPort(t *testing.T, key, addr string) int32 {
	t.Helper()
	_, p, err := net.SplitHostPort(addr)
	n, err2 := strconv.Atoi(p)
	if err != nil || err2 != nil {
		t.Fatalf("config %s %q is not host:port", key, addr)
	}
	return int32(n)
}

func TestKubernetesManifests(t *testing.T) {
	r := render(t)
	sts, c := r.sts, container(t, r.sts)
	podLabels := labels.Set(sts.Spec.Template.Labels)
	httpPort, grpcPort := portNamed(t, c, "http"), portNamed(t, c, "grpc")

	t.Run("probes on /healthz and /readyz of the HTTP listener", func(t *testing.T) {
		for _, p := range []struct {
			name  string
			probe *corev1.Probe
			path  string
		}{{"liveness", c.LivenessProbe, "/healthz"}, {"readiness", c.ReadinessProbe, "/readyz"}, {"startup", c.StartupProbe, "/healthz"}} {
			if p.probe == nil || p.probe.HTTPGet == nil {
				t.Errorf("%s probe: missing or not httpGet", p.name)
				continue
			}
			g := p.probe.HTTPGet
			if g.Path != p.path || g.Port.String() != "http" {
				t.Errorf("%s probe: %s on port %s, want %s on port http", p.name, g.Path, g.Port.String(), p.path)
			}
		}
	})

	t.Run("one persistent volume per replica for the store", func(t *testing.T) {
		vct := sts.Spec.VolumeClaimTemplates
		if len(vct) != 1 {
			t.Fatalf("%d volumeClaimTemplates, want 1", len(vct))
		}
		if !slices.Equal(vct[0].Spec.AccessModes, []corev1.PersistentVolumeAccessMode{corev1.ReadWriteOnce}) {
			t.Errorf("access modes %v, want [ReadWriteOnce] (one writer per bbolt file)", vct[0].Spec.AccessModes)
		}
		var mount string
		for _, m := range c.VolumeMounts {
			if m.Name == vct[0].Name {
				mount = m.MountPath
			}
		}
		if mount == "" || !slices.Contains(c.Args, "--data="+mount) {
			t.Errorf("the claim %q is mounted at %q; args %q must pass it as --data", vct[0].Name, mount, c.Args)
		}
	})

	t.Run("PodDisruptionBudget and Services select the pods", func(t *testing.T) {
		sel, err := metav1.LabelSelectorAsSelector(r.pdb.Spec.Selector)
		if err != nil || sel.Empty() || !sel.Matches(podLabels) {
			t.Errorf("PDB selector %v does not match pod labels %v (%v)", r.pdb.Spec.Selector, podLabels, err)
		}
		if mu := r.pdb.Spec.MaxUnavailable; mu == nil || mu.IntValue() != 1 {
			t.Errorf("PDB maxUnavailable %v, want 1", mu)
		}
		stsSel, err := metav1.LabelSelectorAsSelector(sts.Spec.Selector)
		if err != nil || !stsSel.Matches(podLabels) {
			t.Errorf("StatefulSet selector does not match its pods: %v", err)
		}
		for name, s := range r.services {
			if len(s.Spec.Selector) == 0 || !labels.SelectorFromSet(s.Spec.Selector).Matches(podLabels) {
				t.Errorf("Service %s selector %v does not match pod labels %v", name, s.Spec.Selector, podLabels)
			}
			for _, p := range s.Spec.Ports {
				if want := portNamed(t, c, p.TargetPort.String()); p.Port != want {
					t.Errorf("Service %s port %s: %d -> %s (%d): keep them equal", name, p.Name, p.Port, p.TargetPort.String(), want)
				}
			}
		}
		peers, ok := r.services[sts.Spec.ServiceName]
		if !ok || peers.Spec.ClusterIP != corev1.ClusterIPNone || !peers.Spec.PublishNotReadyAddresses {
			t.Errorf("serviceName %q must name a headless Service that publishes not-ready pods", sts.Spec.ServiceName)
		}
		ingest, ok := r.services["pulsefleet-ingest"]
		if !ok || ingest.Spec.ClusterIP == corev1.ClusterIPNone || ingest.Spec.Ports[0].TargetPort.String() != "grpc" {
			t.Errorf("no load-balanced device ingest Service on the grpc port")
		}
	})

	t.Run("ConfigMap: config, profile and calibration mounted and valid", func(t *testing.T) {
		var vol *corev1.Volume
		for i, v := range sts.Spec.Template.Spec.Volumes {
			if v.ConfigMap != nil {
				vol = &sts.Spec.Template.Spec.Volumes[i]
			}
		}
		if vol == nil || vol.ConfigMap.Name != r.configMap.Name {
			t.Fatalf("no volume refers to the generated ConfigMap %q", r.configMap.Name)
		}
		var dir string
		for _, m := range c.VolumeMounts {
			if m.Name == vol.Name {
				dir = m.MountPath
			}
		}
		var cfgPath string
		for _, a := range c.Args {
			if v, ok := strings.CutPrefix(a, "--config="); ok {
				cfgPath = v
			}
		}
		key, ok := strings.CutPrefix(cfgPath, dir+"/")
		if !ok || r.configMap.Data[key] == "" {
			t.Fatalf("--config=%s is not a key of the ConfigMap mounted at %s", cfgPath, dir)
		}
		var cfg serveConfig
		if err := yaml.Unmarshal([]byte(r.configMap.Data[key]), &cfg); err != nil {
			t.Fatalf("config: %v", err)
		}
		if p := listenPort(t, "http_listen", cfg.HTTPListen); p != httpPort {
			t.Errorf("http_listen port %d, container port http %d", p, httpPort)
		}
		if p := listenPort(t, "grpc_listen", cfg.GRPCListen); p != grpcPort {
			t.Errorf("grpc_listen port %d, container port grpc %d", p, grpcPort)
		}
		profKey, ok := strings.CutPrefix(cfg.Profile, dir+"/")
		if !ok {
			t.Fatalf("profile %q is not in the mounted ConfigMap", cfg.Profile)
		}
		if _, err := alarms.ParseProfile([]byte(r.configMap.Data[profKey])); err != nil {
			t.Errorf("profile %s: %v", profKey, err)
		}
		cals := 0
		for k, v := range r.configMap.Data {
			if strings.HasPrefix(k, "calibration-") {
				cals++
				if _, err := calibration.Parse([]byte(v)); err != nil {
					t.Errorf("%s: %v", k, err)
				}
			}
		}
		if cals == 0 {
			t.Errorf("no calibration-*.yaml in the ConfigMap")
		}

		// Sharding: the peer list is the stable names of exactly the
		// replicas, and every pod finds itself in it from its hostname.
		want, err := shard.StatefulSetPeers(sts.Name, sts.Spec.ServiceName, int(*sts.Spec.Replicas), int(grpcPort))
		if err != nil {
			t.Fatal(err)
		}
		if !slices.Equal(cfg.Peers, want) {
			t.Errorf("config peers %q, want %q (replicas %d, headless Service %s)", cfg.Peers, want, *sts.Spec.Replicas, sts.Spec.ServiceName)
		}
		for i := 0; i < int(*sts.Spec.Replicas); i++ {
			host := fmt.Sprintf("%s-%d", sts.Name, i)
			if self, err := shard.SelfFromHostname(host, cfg.Peers); err != nil || self != want[i] {
				t.Errorf("pod %s finds itself as %q, %v", host, self, err)
			}
		}
	})

	t.Run("hardened pod", func(t *testing.T) {
		ps := sts.Spec.Template.Spec.SecurityContext
		sc := c.SecurityContext
		if ps == nil || ps.RunAsNonRoot == nil || !*ps.RunAsNonRoot || ps.SeccompProfile == nil || ps.SeccompProfile.Type != corev1.SeccompProfileTypeRuntimeDefault {
			t.Errorf("pod securityContext %+v: want runAsNonRoot and the RuntimeDefault seccomp profile", ps)
		}
		if sc == nil || sc.ReadOnlyRootFilesystem == nil || !*sc.ReadOnlyRootFilesystem || sc.AllowPrivilegeEscalation == nil || *sc.AllowPrivilegeEscalation ||
			sc.Capabilities == nil || !slices.Equal(sc.Capabilities.Drop, []corev1.Capability{"ALL"}) {
			t.Errorf("container securityContext %+v: want a read-only root, no privilege escalation, all capabilities dropped", sc)
		}
	})

	t.Run("Prometheus scrape configuration", func(t *testing.T) {
		ann := sts.Spec.Template.Annotations
		if ann["prometheus.io/scrape"] != "true" || ann["prometheus.io/path"] != "/metrics" || ann["prometheus.io/port"] != strconv.Itoa(int(httpPort)) {
			t.Errorf("pod annotations %v: want scrape true, path /metrics, port %d", ann, httpPort)
		}
		b, err := os.ReadFile(filepath.Join("kubernetes", "prometheus-scrape.yaml"))
		if err != nil {
			t.Fatal(err)
		}
		var sc struct {
			ScrapeConfigs []struct {
				JobName             string           `yaml:"job_name"`
				ScrapeInterval      string           `yaml:"scrape_interval"`
				KubernetesSDConfigs []map[string]any `yaml:"kubernetes_sd_configs"`
				RelabelConfigs      []struct {
					SourceLabels []string `yaml:"source_labels"`
					Regex        string   `yaml:"regex"`
					Action       string   `yaml:"action"`
					Replacement  string   `yaml:"replacement"`
					TargetLabel  string   `yaml:"target_label"`
				} `yaml:"relabel_configs"`
			} `yaml:"scrape_configs"`
		}
		dec := yaml.NewDecoder(bytes.NewReader(b))
		dec.KnownFields(true)
		if err := dec.Decode(&sc); err != nil || len(sc.ScrapeConfigs) != 1 {
			t.Fatalf("prometheus-scrape.yaml: %v", err)
		}
		// Every label and annotation the job keeps on must be on the pods
		// (Prometheus maps label/annotation names to [a-zA-Z0-9_]).
		meta := map[string]string{}
		for k, v := range podLabels {
			meta["__meta_kubernetes_pod_label_"+promName(k)] = v
		}
		for k, v := range ann {
			meta["__meta_kubernetes_pod_annotation_"+promName(k)] = v
		}
		keeps := 0
		for _, rc := range sc.ScrapeConfigs[0].RelabelConfigs {
			if rc.Action != "keep" {
				continue
			}
			keeps++
			if len(rc.SourceLabels) != 1 || meta[rc.SourceLabels[0]] != rc.Regex {
				t.Errorf("keep rule on %v =~ %q does not match the pods (%v)", rc.SourceLabels, rc.Regex, meta)
			}
		}
		if keeps < 2 {
			t.Errorf("%d keep rules, want the pod label and the scrape annotation", keeps)
		}
	})
}

func promName(s string) string {
	return strings.Map(func(r rune) rune {
		if r >= 'a' && r <= 'z' || r >= 'A' && r <= 'Z' || r >= '0' && r <= '9' {
			return r
		}
		return '_'
	}, s)
}

// The ko configuration builds the command the StatefulSet runs.
func TestKoConfig(t *testing.T) {
	b, err := os.ReadFile(filepath.Join("ko", ".ko.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	var ko struct {
		DefaultBaseImage string   `yaml:"defaultBaseImage"`
		DefaultPlatforms []string `yaml:"defaultPlatforms"`
		Builds           []struct {
			ID      string   `yaml:"id"`
			Dir     string   `yaml:"dir"`
			Main    string   `yaml:"main"`
			Env     []string `yaml:"env"`
			Flags   []string `yaml:"flags"`
			Ldflags []string `yaml:"ldflags"`
		} `yaml:"builds"`
	}
	dec := yaml.NewDecoder(bytes.NewReader(b))
	dec.KnownFields(true)
	if err := dec.Decode(&ko); err != nil {
		t.Fatal(err)
	}
	if len(ko.Builds) != 1 || ko.Builds[0].Main != "./cmd/pulsefleet" || !slices.Contains(ko.Builds[0].Env, "CGO_ENABLED=0") {
		t.Errorf("ko builds %+v: want one static build of ./cmd/pulsefleet", ko.Builds)
	}
	if _, err := os.Stat(filepath.Join("..", "cmd", "pulsefleet", "main.go")); err != nil {
		t.Errorf("ko main package: %v", err)
	}
	r := render(t)
	if img := container(t, r.sts).Image; img != "ko://github.com/pulsefleet/pulsefleet/cmd/pulsefleet" {
		t.Errorf("image %q is not the ko reference of the command", img)
	}
	if !strings.HasSuffix(ko.DefaultBaseImage, ":nonroot") {
		t.Errorf("base image %q: want a non-root image (the pod runs as uid 65532)", ko.DefaultBaseImage)
	}
}
