package main

import (
	"crypto/tls"
	"crypto/x509"
	"fmt"
	"net"
	"os"

	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials"

	"github.com/pulsefleet/pulsefleet/internal/gateway"
)

// security is the transport set-up derived from the TLS flags.
type security struct {
	mode    string
	grpc    []grpc.ServerOption
	httpTLS *tls.Config
}

func securityOptions(c serveConfig) (*security, error) {
	if c.TLSCert == "" {
		mode := "plaintext, loopback only"
		if c.Insecure {
			mode = "PLAINTEXT on any address (--insecure)"
		}
		return &security{mode: mode}, nil
	}
	cert, err := tls.LoadX509KeyPair(c.TLSCert, c.TLSKey)
	if err != nil {
		return nil, fmt.Errorf("tls-cert/tls-key: %w", err)
	}
	gcfg := &tls.Config{Certificates: []tls.Certificate{cert}, MinVersion: tls.VersionTLS12}
	mode := "TLS"
	if c.ClientCA != "" {
		pem, err := os.ReadFile(c.ClientCA)
		if err != nil {
			return nil, fmt.Errorf("client-ca: %w", err)
		}
		pool := x509.NewCertPool()
		if !pool.AppendCertsFromPEM(pem) {
			return nil, fmt.Errorf("client-ca: %s holds no PEM certificate", c.ClientCA)
		}
		gcfg.ClientCAs = pool
		gcfg.ClientAuth = tls.RequireAndVerifyClientCert
		mode = "mutual TLS (clients must present a certificate)"
	}
	hcfg := &tls.Config{Certificates: []tls.Certificate{cert}, MinVersion: tls.VersionTLS12, NextProtos: []string{"http/1.1"}}
	return &security{mode: mode, grpc: []grpc.ServerOption{grpc.Creds(credentials.NewTLS(gcfg))}, httpTLS: hcfg}, nil
}

// gatewayOptions derives credential enforcement from the transport: only a
// plaintext gateway whose listeners are all on loopback may run open (while
// no token is issued); TLS or any other address requires tokens.
func (s *security) gatewayOptions(c serveConfig) gateway.SecurityOptions {
	loopbackOnly := isLoopback(c.GRPCListen) && isLoopback(c.HTTPListen)
	return gateway.SecurityOptions{
		RequireTokens:  c.RequireToken || c.TLSCert != "" || !loopbackOnly,
		SecureCookies:  c.TLSCert != "",
		DeviceTimeRate: c.DeviceTimeRate,
	}
}

func (s *security) apply(o *gateway.Options, c serveConfig) {
	o.GRPCServerOptions = append(o.GRPCServerOptions, s.grpc...)
	o.Security = s.gatewayOptions(c)
}

func (s *security) wrapHTTP(l net.Listener) net.Listener {
	if s.httpTLS == nil {
		return l
	}
	return tls.NewListener(l, s.httpTLS)
}
