package alertmanager

import (
	"bytes"
	"encoding/json"
	"net/http"
	"os"
	"os/exec"
	"strings"
	"testing"
	"time"

	"go.yaml.in/yaml/v3"

	"github.com/pulsefleet/pulsefleet/internal/notify"
	"github.com/pulsefleet/pulsefleet/internal/notify/notifytest"
)

func amtool(t *testing.T) string {
	t.Helper()
	p, err := exec.LookPath("amtool")
	if err != nil {
		if os.Getenv("PULSEFLEET_REQUIRE_TOOLS") != "" {
			t.Fatalf("amtool is required (PULSEFLEET_REQUIRE_TOOLS is set): %v; .ci/deps.d/alertmanager.sh installs it", err)
		}
		t.Skipf("amtool not installed: %v", err)
	}
	return p
}

func TestConfigIsValid(t *testing.T) {
	out, err := exec.Command(amtool(t), "check-config", "alertmanager.yml").CombinedOutput()
	if err != nil || !strings.Contains(string(out), "SUCCESS") {
		t.Fatalf("amtool check-config: %v\n%s", err, out)
	}
}

// High priority goes to the pager, the rest to the ward team.
func TestRoutes(t *testing.T) {
	at := amtool(t)
	for prio, want := range map[string]string{"high": "on-call-pager", "medium": "ward-team", "low": "ward-team"} {
		out, err := exec.Command(at, "config", "routes", "test", "--config.file=alertmanager.yml",
			"alertname="+notify.AlertName, "priority="+prio, "device=bed-1", "condition=spo2_low").Output()
		if err != nil {
			t.Fatalf("amtool config routes test: %v", err)
		}
		if got := strings.TrimSpace(string(out)); got != want {
			t.Errorf("priority %s routes to %q, want %q", prio, got, want)
		}
	}
}

// The example, run in a real Alertmanager with its receivers pointed at
// the test's webhook receiver (and its group timings cut to 1 s): a high
// and a low alarm of bed-1 and a low alarm of bed-2 arrive together; the
// pager gets bed-1's high one, the ward gets bed-2's low one, and bed-1's
// low one is inhibited (never delivered).
func TestInhibitionInARealAlertmanager(t *testing.T) {
	b, err := os.ReadFile("alertmanager.yml")
	if err != nil {
		t.Fatal(err)
	}
	var cfg map[string]any
	if err := yaml.Unmarshal(b, &cfg); err != nil {
		t.Fatal(err)
	}
	recv := notifytest.NewReceiver(t)
	for _, r := range cfg["receivers"].([]any) {
		r := r.(map[string]any)
		for _, w := range r["webhook_configs"].([]any) {
			w.(map[string]any)["url"] = recv.URL("/" + r["name"].(string))
		}
	}
	var fast func(route map[string]any)
	fast = func(route map[string]any) {
		for _, k := range []string{"group_wait", "group_interval"} {
			if _, ok := route[k]; ok {
				route[k] = "1s"
			}
		}
		if subs, ok := route["routes"].([]any); ok {
			for _, s := range subs {
				fast(s.(map[string]any))
			}
		}
	}
	fast(cfg["route"].(map[string]any))
	out, err := yaml.Marshal(cfg)
	if err != nil {
		t.Fatal(err)
	}
	am := notifytest.Start(t, string(out))

	alert := func(device, condition, prio, episode string) map[string]any {
		return map[string]any{"labels": map[string]string{"alertname": notify.AlertName, "device": device,
			"condition": condition, "priority": prio, "episode": episode}}
	}
	body, _ := json.Marshal([]any{alert("bed-1", "spo2_low", "high", "1"), alert("bed-1", "signal_poor", "low", "2"),
		alert("bed-2", "signal_poor", "low", "3")})
	resp, err := http.Post(am.URL+"/api/v2/alerts", "application/json", bytes.NewReader(body))
	if err != nil {
		t.Fatal(err)
	}
	resp.Body.Close()
	if resp.StatusCode != http.StatusOK {
		t.Fatalf("POST /api/v2/alerts: %s", resp.Status)
	}
	got := func(all []notifytest.Delivered, receiver, episode string) bool {
		for _, a := range all {
			if a.Receiver == "/"+receiver && a.Labels["episode"] == episode {
				return true
			}
		}
		return false
	}
	all, ok := recv.Wait(20*time.Second, func(all []notifytest.Delivered) bool {
		return got(all, "on-call-pager", "1") && got(all, "ward-team", "3")
	})
	if !ok {
		t.Fatalf("want bed-1's high alarm at the pager and bed-2's low one at the ward; received %+v", all)
	}
	time.Sleep(4 * time.Second) // four group intervals more
	for _, a := range recv.All() {
		if a.Labels["episode"] == "2" {
			t.Errorf("bed-1's low alarm was delivered (to %s) although its high alarm is firing", a.Receiver)
		}
		if a.Labels["episode"] == "1" && a.Receiver != "/on-call-pager" || a.Labels["episode"] == "3" && a.Receiver != "/ward-team" {
			t.Errorf("episode %s delivered to %s", a.Labels["episode"], a.Receiver)
		}
	}
}
