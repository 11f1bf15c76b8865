package main

import (
	"context"
	"flag"
	"fmt"
	"log/slog"
	"net/url"
	"os"
	"strings"
	"time"

	"github.com/prometheus/client_golang/prometheus"

	"github.com/pulsefleet/pulsefleet/internal/notify"
	"github.com/pulsefleet/pulsefleet/internal/store"
)

// notifyConfig is the Alertmanager part of serve's configuration (embedded
// in serveConfig; YAML keys are the flag names with _ for -).
type notifyConfig struct {
	Alertmanager          []string `yaml:"alertmanager"`
	AlertmanagerCAFile    string   `yaml:"alertmanager_ca_file"`
	AlertmanagerBasicAuth string   `yaml:"alertmanager_basic_auth_file"`
	AlertmanagerBearer    string   `yaml:"alertmanager_bearer_file"`
	ExternalURL           string   `yaml:"external_url"`
	// AlertmanagerHold: see notify.Options.Hold.
	AlertmanagerHold time.Duration `yaml:"alertmanager_hold"`
}

func (c *notifyConfig) flags(fs *flag.FlagSet) {
	fs.Var((*urlsFlag)(&c.Alertmanager), "alertmanager", "comma-separated Alertmanager URLs (http[s]://HOST:PORT[/PREFIX]); announced, escalated and ended alarm episodes are posted to every one "+
		"(API v2) from a durable outbox in the store; none = no notifications")
	fs.StringVar(&c.AlertmanagerCAFile, "alertmanager-ca-file", c.AlertmanagerCAFile, "CA file (PEM) that signs the Alertmanagers' certificates (https URLs); default: the system's")
	fs.StringVar(&c.AlertmanagerBasicAuth, "alertmanager-basic-auth-file", c.AlertmanagerBasicAuth, "file holding USER:PASSWORD on its first line, for Alertmanager's basic authentication (read again for every request)")
	fs.StringVar(&c.AlertmanagerBearer, "alertmanager-bearer-file", c.AlertmanagerBearer, "file holding a bearer token on its first line, for Alertmanager (read again for every request)")
	fs.DurationVar(&c.AlertmanagerHold, "alertmanager-hold", c.AlertmanagerHold, "how long an alarm that ended before Alertmanager ever had it (Alertmanager or this gateway was down) is sent as firing, "+
		"marked delivered_late, before its resolution: Alertmanager never notifies an alert that arrives resolved; "+notify.MinHold.String()+".."+notify.MaxHold.String()+", keep it above the routes' group_wait")
	fs.StringVar(&c.ExternalURL, "external-url", c.ExternalURL, "URL at which people reach this gateway's web page, for the device-page link in notifications (default: the --http-listen address)")
}

func (c *notifyConfig) validate() error {
	for _, u := range c.Alertmanager {
		if _, err := notify.ParseURL(u); err != nil {
			return err
		}
	}
	if len(c.Alertmanager) == 0 && (c.AlertmanagerCAFile != "" || c.AlertmanagerBasicAuth != "" || c.AlertmanagerBearer != "") {
		return fmt.Errorf("alertmanager-ca-file, alertmanager-basic-auth-file, alertmanager-bearer-file: given without --alertmanager")
	}
	if err := notify.CheckHold(c.AlertmanagerHold); err != nil {
		return err
	}
	if c.ExternalURL != "" {
		u, err := url.Parse(c.ExternalURL)
		if err != nil || (u.Scheme != "http" && u.Scheme != "https") || u.Host == "" {
			return fmt.Errorf("external-url: %q, want an http or https URL such as https://ward.example/pulsefleet", c.ExternalURL)
		}
	}
	return c.auth().Check()
}

func (c *notifyConfig) auth() notify.Auth {
	return notify.Auth{CAFile: c.AlertmanagerCAFile, BasicAuthFile: c.AlertmanagerBasicAuth, BearerFile: c.AlertmanagerBearer}
}

// startNotifier registers the notifier's metrics (always, so the series
// exist on every gateway) and, with --alertmanager, turns the store's
// outbox on and starts delivering it. The returned stop waits for the
// notifier; call it after the gateway stopped writing. Without
// --alertmanager a non-empty outbox (left by an earlier run) is reported.
func startNotifier(c serveConfig, db *store.DB, reg prometheus.Registerer, log *slog.Logger, pageBase string) (func(), error) {
	m, err := notify.NewMetrics(reg)
	if err != nil {
		return nil, err
	}
	if len(c.Alertmanager) == 0 {
		if _, n, err := db.Outbox(0); err == nil && n > 0 {
			log.Warn("notifications wait in the store's outbox, but no --alertmanager is given: they are not delivered", "queued", n)
		}
		return func() {}, nil
	}
	gw := c.Self
	if gw == "" && len(c.Etcd) > 0 {
		gw = c.Advertise // a fleet on etcd names its gateways so
	}
	if gw == "" {
		gw, _ = os.Hostname()
	}
	if c.ExternalURL != "" {
		pageBase = c.ExternalURL
	}
	n, err := notify.New(notify.Options{URLs: c.Alertmanager, Auth: c.auth(), Store: db, Gateway: gw, PageBase: pageBase, Fleet: len(c.Etcd) > 0,
		Hold: c.AlertmanagerHold, Metrics: m, Logger: log.With("component", "notify")})
	if err != nil {
		return nil, err
	}
	db.EnableOutbox(n.Kick)
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan struct{})
	go func() {
		defer close(done)
		if err := n.Run(ctx); err != nil {
			log.Error("notifications stopped", "err", err)
		}
	}()
	log.Info("notifications on", "alertmanager", strings.Join(n.Targets(), ","), "resend_every", "1m", "hold", c.AlertmanagerHold)
	return func() { cancel(); <-done }, nil
}

// urlsFlag is a comma-separated list of URLs that prints back the same way.
type urlsFlag []string

func (p *urlsFlag) String() string { return strings.Join(*p, ",") }

func (p *urlsFlag) Set(v string) error {
	*p = nil
	for _, s := range strings.Split(v, ",") {
		if s = strings.TrimSpace(s); s != "" {
			*p = append(*p, s)
		}
	}
	return nil
}
