package deploy

import (
	"slices"
	"strconv"
	"strings"
	"testing"

	"go.yaml.in/yaml/v3"
)

// The etcd overlay renders strictly, swaps the static peer list for etcd
// endpoints, and makes each pod advertise its stable DNS name on the gRPC
// port (the address the other gateways redirect its devices to).
func TestKubernetesEtcdOverlay(t *testing.T) {
	r := renderDir(t, "kubernetes-etcd")
	sts, c := r.sts, container(t, r.sts)
	var cfgKey string
	for _, a := range c.Args {
		if v, ok := strings.CutPrefix(a, "--config="); ok {
			cfgKey = v[strings.LastIndexByte(v, '/')+1:]
		}
	}
	var cfg struct {
		GRPCListen string   `yaml:"grpc_listen"`
		Peers      []string `yaml:"peers"`
		Etcd       []string `yaml:"etcd"`
		Prefix     string   `yaml:"etcd_prefix"`
	}
	if err := yaml.Unmarshal([]byte(r.configMap.Data[cfgKey]), &cfg); err != nil {
		t.Fatalf("config %s: %v", cfgKey, err)
	}
	if len(cfg.Peers) != 0 {
		t.Errorf("overlay config keeps peers %q: serve refuses peers with etcd", cfg.Peers)
	}
	if len(cfg.Etcd) != 3 {
		t.Errorf("etcd endpoints %q, want the three members of the fleet's etcd", cfg.Etcd)
	}
	for _, e := range cfg.Etcd {
		if !strings.HasPrefix(e, "http://") && !strings.HasPrefix(e, "https://") {
			t.Errorf("etcd endpoint %q: serve wants http:// or https://", e)
		}
	}
	if !strings.HasPrefix(cfg.Prefix, "/") || !strings.HasSuffix(cfg.Prefix, "/") {
		t.Errorf("etcd_prefix %q: serve wants a path starting and ending with /", cfg.Prefix)
	}
	grpcPort := listenPort(t, "grpc_listen", cfg.GRPCListen)
	want := "--advertise=$(POD_NAME)." + sts.Spec.ServiceName + ":" + strconv.Itoa(int(grpcPort))
	if !slices.Contains(c.Args, want) {
		t.Errorf("args %q lack %q", c.Args, want)
	}
	pod := false
	for _, e := range c.Env {
		pod = pod || e.Name == "POD_NAME" && e.ValueFrom != nil && e.ValueFrom.FieldRef != nil && e.ValueFrom.FieldRef.FieldPath == "metadata.name"
	}
	if !pod {
		t.Error("POD_NAME (metadata.name) is not in the container's environment: $(POD_NAME) would stay literal")
	}
}
