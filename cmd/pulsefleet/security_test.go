package main

import (
	"bytes"
	"context"
	"crypto/ecdsa"
	"crypto/elliptic"
	"crypto/rand"
	"crypto/tls"
	"crypto/x509"
	"crypto/x509/pkix"
	"encoding/pem"
	"io"
	"math/big"
	"net"
	"net/http"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials"
	"google.golang.org/grpc/credentials/insecure"
	healthpb "google.golang.org/grpc/health/grpc_health_v1"
)

// testPKI is a CA made in the test, with a server certificate for
// 127.0.0.1 and a client certificate, written as PEM files.
type testPKI struct {
	dir                  string
	caFile               string
	serverCert, serverKy string
	clientCert, clientKy string
	pool                 *x509.CertPool
	client               tls.Certificate
}

func newTestPKI(t *testing.T, dir string) *testPKI {
	t.Helper()
	p := &testPKI{dir: dir}
	caKey, err := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
	if err != nil {
		t.Fatal(err)
	}
	now := time.Now()
	caTmpl := &x509.Certificate{SerialNumber: big.NewInt(1), Subject: pkix.Name{CommonName: "pulsefleet test CA"},
		NotBefore: now.Add(-time.Hour), NotAfter: now.Add(24 * time.Hour), IsCA: true, BasicConstraintsValid: true,
		KeyUsage: x509.KeyUsageCertSign | x509.KeyUsageDigitalSignature}
	caDER, err := x509.CreateCertificate(rand.Reader, caTmpl, caTmpl, &caKey.PublicKey, caKey)
	if err != nil {
		t.Fatal(err)
	}
	caCert, _ := x509.ParseCertificate(caDER)
	p.caFile = p.write(t, "ca.pem", "CERTIFICATE", caDER)
	p.pool = x509.NewCertPool()
	p.pool.AddCert(caCert)

	leaf := func(name string, serial int64, usage x509.ExtKeyUsage, ips []net.IP) (certFile, keyFile string, pair tls.Certificate) {
		k, err := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
		if err != nil {
			t.Fatal(err)
		}
		tmpl := &x509.Certificate{SerialNumber: big.NewInt(serial), Subject: pkix.Name{CommonName: name},
			NotBefore: now.Add(-time.Hour), NotAfter: now.Add(24 * time.Hour), KeyUsage: x509.KeyUsageDigitalSignature,
			ExtKeyUsage: []x509.ExtKeyUsage{usage}, IPAddresses: ips}
		der, err := x509.CreateCertificate(rand.Reader, tmpl, caCert, &k.PublicKey, caKey)
		if err != nil {
			t.Fatal(err)
		}
		kb, err := x509.MarshalECPrivateKey(k)
		if err != nil {
			t.Fatal(err)
		}
		certFile = p.write(t, name+".pem", "CERTIFICATE", der)
		keyFile = p.write(t, name+"-key.pem", "EC PRIVATE KEY", kb)
		pair, err = tls.LoadX509KeyPair(certFile, keyFile)
		if err != nil {
			t.Fatal(err)
		}
		return
	}
	p.serverCert, p.serverKy, _ = leaf("server", 2, x509.ExtKeyUsageServerAuth, []net.IP{net.IPv4(127, 0, 0, 1)})
	p.clientCert, p.clientKy, p.client = leaf("device-1", 3, x509.ExtKeyUsageClientAuth, nil)
	return p
}

func (p *testPKI) write(t *testing.T, name, typ string, der []byte) string {
	t.Helper()
	f := filepath.Join(p.dir, name)
	if err := os.WriteFile(f, pem.EncodeToMemory(&pem.Block{Type: typ, Bytes: der}), 0o600); err != nil {
		t.Fatal(err)
	}
	return f
}

func testServeConfig(t *testing.T) serveConfig {
	c := defaultServeConfig()
	c.Data = t.TempDir()
	c.GRPCListen, c.HTTPListen = "127.0.0.1:0", "127.0.0.1:0"
	c.LogLevel = "error"
	return c
}

// healthOver checks the standard gRPC health service with the given transport credentials.
func healthOver(addr string, creds credentials.TransportCredentials) error {
	conn, err := grpc.NewClient(addr, grpc.WithTransportCredentials(creds))
	if err != nil {
		return err
	}
	defer conn.Close()
	ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
	defer cancel()
	_, err = healthpb.NewHealthClient(conn).Check(ctx, &healthpb.HealthCheckRequest{})
	return err
}

// TLS from certificate files on gRPC and HTTP, and mutual TLS: a standard
// grpc-go client with credentials.NewTLS gets in with the CA (and, for
// mutual TLS, a client certificate the CA signed); without them it does not.
func TestTLSAndMutualTLS(t *testing.T) {
	pki := newTestPKI(t, t.TempDir())
	other := newTestPKI(t, t.TempDir()) // a CA the gateway does not trust

	c := testServeConfig(t)
	c.TLSCert, c.TLSKey = pki.serverCert, pki.serverKy
	if err := c.validate(); err != nil {
		t.Fatal(err)
	}
	rg, stop, err := startGateway(context.Background(), c, io.Discard)
	if err != nil {
		t.Fatal(err)
	}
	if rg.Mode != "TLS" || !strings.Contains(rg.Auth, "tokens required") {
		t.Errorf("mode %q, auth %q; want TLS with tokens required", rg.Mode, rg.Auth)
	}
	if err := healthOver(rg.GRPCAddr, credentials.NewTLS(&tls.Config{RootCAs: pki.pool})); err != nil {
		t.Errorf("TLS client with the CA: %v", err)
	}
	if err := healthOver(rg.GRPCAddr, insecure.NewCredentials()); err == nil {
		t.Error("a plaintext client got an answer from a TLS gateway")
	}
	if err := healthOver(rg.GRPCAddr, credentials.NewTLS(&tls.Config{RootCAs: other.pool})); err == nil {
		t.Error("a client that does not trust the gateway's CA connected")
	}
	hc := &http.Client{Transport: &http.Transport{TLSClientConfig: &tls.Config{RootCAs: pki.pool}}, Timeout: 10 * time.Second}
	resp, err := hc.Get("https://" + rg.HTTPAddr + "/healthz")
	if err != nil {
		t.Errorf("HTTPS /healthz: %v", err)
	} else {
		resp.Body.Close()
		if resp.StatusCode != 200 || resp.TLS == nil {
			t.Errorf("HTTPS /healthz: %d, TLS %v", resp.StatusCode, resp.TLS != nil)
		}
	}
	hc.CloseIdleConnections()
	if err := stop(); err != nil {
		t.Fatal(err)
	}

	c = testServeConfig(t)
	c.TLSCert, c.TLSKey, c.ClientCA = pki.serverCert, pki.serverKy, pki.caFile
	rg, stop, err = startGateway(context.Background(), c, io.Discard)
	if err != nil {
		t.Fatal(err)
	}
	defer stop()
	if !strings.HasPrefix(rg.Mode, "mutual TLS") {
		t.Errorf("mode %q, want mutual TLS", rg.Mode)
	}
	if err := healthOver(rg.GRPCAddr, credentials.NewTLS(&tls.Config{RootCAs: pki.pool, Certificates: []tls.Certificate{pki.client}})); err != nil {
		t.Errorf("mutual TLS with a client certificate: %v", err)
	}
	if err := healthOver(rg.GRPCAddr, credentials.NewTLS(&tls.Config{RootCAs: pki.pool})); err == nil {
		t.Error("a client without a certificate got through mutual TLS")
	}
	if err := healthOver(rg.GRPCAddr, credentials.NewTLS(&tls.Config{RootCAs: pki.pool, Certificates: []tls.Certificate{other.client}})); err == nil {
		t.Error("a client certificate from an untrusted CA got through mutual TLS")
	}
	// The CLI's shared client flags speak mutual TLS too.
	var out, errb bytes.Buffer
	code := run(context.Background(), []string{"audit", "--gateway", rg.GRPCAddr, "--ca", pki.caFile, "--cert", pki.clientCert, "--key", pki.clientKy},
		stdio{out: &out, err: &errb})
	if code != 1 || !strings.Contains(errb.String(), "Unauthenticated") {
		t.Errorf("audit over mutual TLS without a token: exit %d, %q; want refused by the credential check (the transport worked)", code, errb.String())
	}
}

func secRun(t *testing.T, env map[string]string, args ...string) (int, string, string) {
	t.Helper()
	for k, v := range env {
		t.Setenv(k, v)
	}
	var out, errb bytes.Buffer
	code := run(context.Background(), args, stdio{in: strings.NewReader(""), out: &out, err: &errb})
	return code, out.String(), errb.String()
}

// The credential life cycle through the CLI: the first admin token is issued
// on the stopped store, then the running gateway requires tokens and the same
// commands work through --gateway with it; everything lands in the audit log.
func TestTokenAndAuditCommands(t *testing.T) {
	c := testServeConfig(t)
	code, out, errs := secRun(t, nil, "token", "issue", "--data", c.Data, "--operator", "admin-ro", "--role", "admin")
	if code != 0 || !strings.HasPrefix(out, "pf1_") || !strings.Contains(errs, "shown only this once") {
		t.Fatalf("issue admin: exit %d out %q err %q", code, out, errs)
	}
	admin := strings.TrimSpace(out)
	// Bad usage names the flag.
	for _, bad := range [][]string{
		{"token", "issue", "--data", c.Data, "--operator", "x", "--role", "root"},
		{"token", "issue", "--data", c.Data, "--device", "bed-1", "--role", "admin"},
		{"token", "issue", "--data", c.Data},
		{"token", "revoke", "--data", c.Data},
		{"token", "frobnicate"},
		{"audit", "--data", c.Data, "--since", "yesterday"},
	} {
		if code, _, errs := secRun(t, nil, bad...); code != 2 || !strings.Contains(errs, "--") && !strings.Contains(errs, "subcommand") {
			t.Errorf("%v: exit %d, %q; want a usage error naming the flag", bad, code, errs)
		}
	}

	rg, stopGW, err := startGateway(context.Background(), c, io.Discard)
	if err != nil {
		t.Fatal(err)
	}
	stop := sync.OnceValue(stopGW)
	defer stop()
	if !strings.Contains(rg.Auth, "tokens required (1 credentials") {
		t.Errorf("auth mode %q", rg.Auth)
	}
	// The store is locked: --data says to use --gateway.
	if code, _, errs := secRun(t, nil, "token", "list", "--data", c.Data, "--wait", "50ms"); code != 1 || !strings.Contains(errs, "--gateway") {
		t.Errorf("list --data while running: exit %d, %q", code, errs)
	}
	// Without a token: refused.
	if code, _, errs := secRun(t, nil, "token", "issue", "--gateway", rg.GRPCAddr, "--device", "bed-1"); code != 1 || !strings.Contains(errs, "Unauthenticated") {
		t.Errorf("issue without a token: exit %d, %q", code, errs)
	}
	// With the admin token from the environment.
	env := map[string]string{"PULSEFLEET_TOKEN": admin}
	code, out, errs = secRun(t, env, "token", "issue", "--gateway", rg.GRPCAddr, "--device", "bed-1")
	if code != 0 || !strings.HasPrefix(out, "pf1_") {
		t.Fatalf("issue through the gateway: exit %d, %q %q", code, out, errs)
	}
	devID := strings.Split(strings.TrimSpace(out), "_")[1]
	code, out, _ = secRun(t, env, "token", "list", "--gateway", rg.GRPCAddr)
	if code != 0 || !strings.Contains(out, devID) || !strings.Contains(out, "admin-ro") || strings.Contains(out, "pf1_") {
		t.Errorf("list: exit %d\n%s", code, out)
	}
	if code, out, errs := secRun(t, env, "token", "revoke", "--gateway", rg.GRPCAddr, "--id", devID); code != 0 || !strings.Contains(out, "revoked "+devID) {
		t.Errorf("revoke: exit %d %q %q", code, out, errs)
	}
	code, out, _ = secRun(t, env, "token", "list", "--gateway", rg.GRPCAddr, "--format", "json")
	if code != 0 || !strings.Contains(out, `"revokedUnixMs"`) {
		t.Errorf("list json after revoke: exit %d\n%s", code, out)
	}
	code, out, errs = secRun(t, env, "audit", "--gateway", rg.GRPCAddr, "--action", "token.", "--since", "1h")
	if code != 0 || strings.Count(out, "token.issue") != 2 || strings.Count(out, "token.revoke") != 1 || !strings.Contains(out, "local:") {
		t.Errorf("audit through the gateway: exit %d %q\n%s", code, errs, out)
	}
	if err := stop(); err != nil {
		t.Fatal(err)
	}
	// Stopped: the same log from the store, refusals included.
	code, out, _ = secRun(t, nil, "audit", "--data", c.Data, "--action", "auth.")
	if code != 0 || !strings.Contains(out, "auth.failure") || !strings.Contains(out, "127.0.0.1:") {
		t.Errorf("audit --data: exit %d\n%s", code, out)
	}
}

func TestParseSince(t *testing.T) {
	now := time.Date(2026, 11, 30, 22, 0, 0, 0, time.UTC)
	for in, want := range map[string]int64{
		"":                     0,
		"24h":                  now.Add(-24 * time.Hour).UnixMilli(),
		"2026-11-30T21:00:00Z": now.Add(-time.Hour).UnixMilli(),
		"1796076000":           1796076000000,
	} {
		got, err := parseSince(in, now)
		if err != nil || got != want {
			t.Errorf("parseSince(%q) = %d, %v; want %d", in, got, err, want)
		}
	}
	for _, bad := range []string{"-1h", "yesterday", "NaN"} {
		if _, err := parseSince(bad, now); err == nil {
			t.Errorf("parseSince(%q) accepted", bad)
		}
	}
}
