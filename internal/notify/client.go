package notify

import (
	"bytes"
	"context"
	"crypto/tls"
	"crypto/x509"
	"encoding/json"
	"fmt"
	"io"
	"net/http"
	"net/url"
	"os"
	"strings"
	"time"
)

// Auth is how the gateway proves itself to Alertmanager. Secrets live in
// files (never on a command line, where any local user can read them from
// the process list); each file is read again for every request, so a
// rotated secret takes effect without a restart.
type Auth struct {
	// CAFile is a PEM file of the CAs that sign Alertmanager's certificate
	// (https URLs); empty means the system's.
	CAFile string
	// BasicAuthFile holds "USER:PASSWORD" on its first line.
	BasicAuthFile string
	// BearerFile holds a bearer token on its first line.
	BearerFile string
}

// Check reads every file once and reports the first problem, naming the
// file and what is wrong (serve calls it at start-up).
func (a Auth) Check() error {
	if a.BasicAuthFile != "" && a.BearerFile != "" {
		return fmt.Errorf("alertmanager-basic-auth-file, alertmanager-bearer-file: give one or neither")
	}
	if _, err := a.tlsConfig(); err != nil {
		return err
	}
	_, err := a.header()
	return err
}

func (a Auth) tlsConfig() (*tls.Config, error) {
	if a.CAFile == "" {
		return nil, nil
	}
	pem, err := os.ReadFile(a.CAFile)
	if err != nil {
		return nil, fmt.Errorf("alertmanager-ca-file: %w", err)
	}
	pool := x509.NewCertPool()
	if !pool.AppendCertsFromPEM(pem) {
		return nil, fmt.Errorf("alertmanager-ca-file: %s holds no PEM certificate", a.CAFile)
	}
	return &tls.Config{RootCAs: pool, MinVersion: tls.VersionTLS12}, nil
}

// header returns the Authorization header value ("" for none).
func (a Auth) header() (string, error) {
	switch {
	case a.BasicAuthFile != "":
		line, err := firstLine(a.BasicAuthFile, "alertmanager-basic-auth-file")
		if err != nil {
			return "", err
		}
		user, pass, ok := strings.Cut(line, ":")
		if !ok || user == "" {
			return "", fmt.Errorf("alertmanager-basic-auth-file: %s: want USER:PASSWORD on the first line", a.BasicAuthFile)
		}
		r := http.Request{Header: http.Header{}}
		r.SetBasicAuth(user, pass)
		return r.Header.Get("Authorization"), nil
	case a.BearerFile != "":
		tok, err := firstLine(a.BearerFile, "alertmanager-bearer-file")
		if err != nil {
			return "", err
		}
		return "Bearer " + tok, nil
	}
	return "", nil
}

func firstLine(path, flag string) (string, error) {
	b, err := os.ReadFile(path)
	if err != nil {
		return "", fmt.Errorf("%s: %w", flag, err)
	}
	line, _, _ := strings.Cut(string(b), "\n")
	line = strings.TrimSpace(line)
	if line == "" {
		return "", fmt.Errorf("%s: %s is empty", flag, path)
	}
	return line, nil
}

// client posts alerts to one Alertmanager.
type client struct {
	base string // as configured, for labels and logs (no credentials)
	url  string // .../api/v2/alerts
	http *http.Client
	auth Auth
}

// ParseURL checks an Alertmanager URL: http or https, a host, no
// credentials (they go in files), no query.
func ParseURL(s string) (string, error) {
	u, err := url.Parse(s)
	if err != nil {
		return "", fmt.Errorf("alertmanager: %q: %v", s, err)
	}
	if u.Scheme != "http" && u.Scheme != "https" || u.Host == "" {
		return "", fmt.Errorf("alertmanager: %q: want http://HOST:PORT or https://HOST:PORT (an optional path prefix may follow)", s)
	}
	if u.User != nil {
		return "", fmt.Errorf("alertmanager: %q: credentials in the URL would show in the process list and the metrics; use --alertmanager-basic-auth-file", u.Redacted())
	}
	if u.RawQuery != "" || u.Fragment != "" {
		return "", fmt.Errorf("alertmanager: %q: no query or fragment, please", s)
	}
	return strings.TrimRight(u.String(), "/"), nil
}

func newClient(base string, auth Auth, timeout time.Duration) (*client, error) {
	tc, err := auth.tlsConfig()
	if err != nil {
		return nil, err
	}
	tr := http.DefaultTransport.(*http.Transport).Clone()
	tr.TLSClientConfig = tc
	tr.Proxy = nil // Alertmanager is reached directly; no environment proxy in between
	return &client{base: base, url: base + "/api/v2/alerts", http: &http.Client{Transport: tr, Timeout: timeout}, auth: auth}, nil
}

// post sends alerts; nil means Alertmanager answered 2xx (it accepted them).
func (c *client) post(ctx context.Context, alerts []Alert) error {
	body, err := json.Marshal(alerts)
	if err != nil {
		return err
	}
	req, err := http.NewRequestWithContext(ctx, http.MethodPost, c.url, bytes.NewReader(body))
	if err != nil {
		return err
	}
	req.Header.Set("Content-Type", "application/json")
	h, err := c.auth.header()
	if err != nil {
		return err
	}
	if h != "" {
		req.Header.Set("Authorization", h)
	}
	resp, err := c.http.Do(req)
	if err != nil {
		return err
	}
	defer resp.Body.Close()
	msg, _ := io.ReadAll(io.LimitReader(resp.Body, 512))
	if resp.StatusCode/100 != 2 {
		return fmt.Errorf("POST %s: %s: %s", c.url, resp.Status, strings.TrimSpace(string(msg)))
	}
	return nil
}

func (c *client) close() { c.http.CloseIdleConnections() }
