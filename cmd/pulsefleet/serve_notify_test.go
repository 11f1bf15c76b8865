package main

import (
	"bytes"
	"context"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"
)

// Alertmanager settings that cannot work are refused before anything
// starts, naming the setting; the YAML keys are the flag names.
func TestServeAlertmanagerSettingsErrors(t *testing.T) {
	dir := t.TempDir()
	empty := filepath.Join(dir, "empty")
	os.WriteFile(empty, nil, 0o600)
	noColon := filepath.Join(dir, "nocolon")
	os.WriteFile(noColon, []byte("justauser\n"), 0o600)
	cfg := filepath.Join(dir, "c.yaml")
	os.WriteFile(cfg, []byte("alertmanager: [\"ftp://am:9093\"]\n"), 0o600)
	holdCfg := filepath.Join(dir, "hold.yaml")
	os.WriteFile(holdCfg, []byte("alertmanager: [\"http://127.0.0.1:9\"]\nalertmanager_hold: 2h\n"), 0o600)
	done, cancel := context.WithCancel(context.Background())
	cancel()
	for _, c := range []struct {
		args []string
		want string
	}{
		{[]string{"--alertmanager", "http://pulse:secret@am:9093"}, "alertmanager-basic-auth-file"},
		{[]string{"--alertmanager", "am:9093"}, "want http://HOST:PORT"},
		{[]string{"--alertmanager-bearer-file", empty}, "given without --alertmanager"},
		{[]string{"--alertmanager", "http://127.0.0.1:9", "--alertmanager-bearer-file", empty}, "alertmanager-bearer-file: " + empty + " is empty"},
		{[]string{"--alertmanager", "http://127.0.0.1:9", "--alertmanager-basic-auth-file", noColon}, "want USER:PASSWORD"},
		{[]string{"--alertmanager", "http://127.0.0.1:9", "--alertmanager-ca-file", filepath.Join(dir, "missing.pem")}, "alertmanager-ca-file:"},
		{[]string{"--alertmanager", "http://127.0.0.1:9", "--external-url", "ward.example"}, "external-url:"},
		{[]string{"--config", cfg}, `"ftp://am:9093"`},
		{[]string{"--alertmanager", "http://127.0.0.1:9", "--alertmanager-hold", "1s"}, "alertmanager-hold: 1s is out of range [5s, 30m0s]"},
		{[]string{"--config", holdCfg}, "alertmanager-hold: 2h0m0s is out of range [5s, 30m0s]"},
	} {
		var out, errb bytes.Buffer
		args := append([]string{"serve", "--data", dir, "--grpc-listen", "127.0.0.1:0", "--http-listen", "127.0.0.1:0"}, c.args...)
		code := run(done, args, stdio{in: strings.NewReader(""), out: &out, err: &errb})
		if code == 0 || !strings.Contains(errb.String(), c.want) {
			t.Errorf("%v: exit %d, stderr %q; want an error with %q", c.args, code, errb.String(), c.want)
		}
	}
}

// The YAML keys of --config set the Alertmanager settings.
func TestServeAlertmanagerConfigKeys(t *testing.T) {
	p := filepath.Join(t.TempDir(), "c.yaml")
	os.WriteFile(p, []byte("alertmanager:\n  - http://am-0:9093\n  - http://am-1:9093\nalertmanager_bearer_file: /run/token\n"+
		"alertmanager_ca_file: /run/ca.pem\nalertmanager_basic_auth_file: /run/basic\nexternal_url: https://ward.example/\nalertmanager_hold: 3m\n"), 0o600)
	c := defaultServeConfig()
	if err := loadServeConfig(p, &c); err != nil {
		t.Fatal(err)
	}
	if strings.Join(c.Alertmanager, ",") != "http://am-0:9093,http://am-1:9093" || c.AlertmanagerBearer != "/run/token" ||
		c.AlertmanagerCAFile != "/run/ca.pem" || c.AlertmanagerBasicAuth != "/run/basic" || c.ExternalURL != "https://ward.example/" || c.AlertmanagerHold != 3*time.Minute {
		t.Errorf("config not applied: %+v", c.notifyConfig)
	}
	for _, k := range []string{"alertmanager", "alertmanager_ca_file", "alertmanager_basic_auth_file", "alertmanager_bearer_file", "external_url", "alertmanager_hold"} {
		if !strings.Contains(strings.Join(serveConfigKeys(), " "), k) {
			t.Errorf("serveConfigKeys lacks %s", k)
		}
	}
}
