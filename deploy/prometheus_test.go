package deploy

import (
	"encoding/json"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"testing"

	"go.yaml.in/yaml/v3"
)

// The scrape job, run through Prometheus's own relabelling (promtool check
// service-discovery): a pulsefleet pod, as Kubernetes pod discovery would
// describe it (one target per container port, its labels and annotations as
// __meta_kubernetes_pod_* labels), becomes one target POD_IP:HTTP_PORT with
// path /metrics and pod/namespace labels; another pod is dropped.
// Debian's promtool is built without Kubernetes discovery, so the job's
// kubernetes_sd_configs is swapped for static_configs carrying those labels.
func TestPrometheusScrapeJobRelabels(t *testing.T) {
	promtool := needTool(t, "promtool", ".ci/deps.d/promtool.sh installs it")
	r := render(t)
	c := container(t, r.sts)
	httpPort := portNamed(t, c, "http")

	b, err := os.ReadFile(filepath.Join("kubernetes", "prometheus-scrape.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	var cfg map[string]any
	if err := yaml.Unmarshal(b, &cfg); err != nil {
		t.Fatal(err)
	}
	job := cfg["scrape_configs"].([]any)[0].(map[string]any)
	if _, ok := job["kubernetes_sd_configs"]; !ok {
		t.Fatal("the job does not use Kubernetes pod discovery")
	}
	delete(job, "kubernetes_sd_configs")
	const podIP = "10.1.2.3" // documentation-style address; nothing is contacted
	meta := func(labels, annotations map[string]string) map[string]string {
		m := map[string]string{"__meta_kubernetes_namespace": "ward-pilot", "__meta_kubernetes_pod_name": "pulsefleet-1"}
		for k, v := range labels {
			m["__meta_kubernetes_pod_label_"+promName(k)] = v
		}
		for k, v := range annotations {
			m["__meta_kubernetes_pod_annotation_"+promName(k)] = v
		}
		return m
	}
	var static []any
	for _, p := range c.Ports {
		static = append(static, map[string]any{
			"targets": []string{podIP + ":" + strconv.Itoa(int(p.ContainerPort))},
			"labels":  meta(r.sts.Spec.Template.Labels, r.sts.Spec.Template.Annotations),
		})
	}
	static = append(static, map[string]any{ // a pod of another application, annotated for scraping
		"targets": []string{"10.1.2.4:8080"},
		"labels":  meta(map[string]string{"app.kubernetes.io/name": "other"}, r.sts.Spec.Template.Annotations),
	})
	job["static_configs"] = static
	out, err := yaml.Marshal(cfg)
	if err != nil {
		t.Fatal(err)
	}
	file := filepath.Join(t.TempDir(), "prometheus.yml")
	if err := os.WriteFile(file, out, 0o644); err != nil {
		t.Fatal(err)
	}
	if msg, err := exec.Command(promtool, "check", "config", file).CombinedOutput(); err != nil {
		t.Fatalf("promtool check config: %v\n%s", err, msg)
	}
	msg, err := exec.Command(promtool, "check", "service-discovery", "--timeout=2s", file, job["job_name"].(string)).Output()
	if err != nil {
		t.Fatalf("promtool check service-discovery: %v\n%s", err, msg)
	}
	var targets []struct {
		Labels map[string]string `json:"labels"`
	}
	if err := json.Unmarshal(msg, &targets); err != nil {
		t.Fatalf("%v\n%s", err, msg)
	}
	want := podIP + ":" + strconv.Itoa(int(httpPort))
	kept := 0
	for _, tg := range targets {
		if len(tg.Labels) == 0 {
			continue // dropped
		}
		kept++
		if tg.Labels["__address__"] != want || tg.Labels["__metrics_path__"] != "/metrics" || tg.Labels["pod"] != "pulsefleet-1" || tg.Labels["namespace"] != "ward-pilot" {
			t.Errorf("target %v, want address %s, path /metrics, pod and namespace labels", tg.Labels, want)
		}
	}
	if kept != len(c.Ports) || len(targets) != len(c.Ports)+1 {
		t.Errorf("%d of %d targets kept, want the %d of the pulsefleet pod (the same address, merged by Prometheus) and not the other pod:\n%s", kept, len(targets), len(c.Ports), msg)
	}
}
