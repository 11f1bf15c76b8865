package main

import (
	"context"
	"crypto/tls"
	"crypto/x509"
	"flag"
	"fmt"
	"os"
	"strings"

	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials"
	"google.golang.org/grpc/credentials/insecure"
	"google.golang.org/grpc/metadata"
)

// clientFlags are the flags of every command that talks to running gateways.
type clientFlags struct {
	gateways string // comma-separated host:port list
	token    string
	caFile   string
	certFile string
	keyFile  string
}

func (c *clientFlags) register(fs *flag.FlagSet) {
	fs.StringVar(&c.gateways, "gateway", "", "gRPC address of the gateway, host:port; several, comma-separated, for a sharded fleet (results are merged)")
	fs.StringVar(&c.token, "token", "", "bearer token (default: $PULSEFLEET_TOKEN)")
	fs.StringVar(&c.caFile, "ca", "", "CA certificate (PEM) to verify the gateway's TLS certificate; enables TLS")
	fs.StringVar(&c.certFile, "cert", "", "client certificate (PEM) for mutual TLS")
	fs.StringVar(&c.keyFile, "key", "", "client key (PEM) for mutual TLS")
}

func (c *clientFlags) addrs() ([]string, error) {
	if strings.TrimSpace(c.gateways) == "" {
		return nil, usagef("--gateway: required (host:port of a running gateway)")
	}
	var out []string
	for _, a := range strings.Split(c.gateways, ",") {
		if a = strings.TrimSpace(a); a != "" {
			out = append(out, a)
		}
	}
	return out, nil
}

// dial opens a client connection to one gateway with the credentials given.
func (c *clientFlags) dial(addr string) (*grpc.ClientConn, error) { return c.dialWith(addr) }

// dialWith is dial with further options.
func (c *clientFlags) dialWith(addr string, opts ...grpc.DialOption) (*grpc.ClientConn, error) {
	creds := insecure.NewCredentials()
	if c.caFile != "" || c.certFile != "" {
		cfg := &tls.Config{MinVersion: tls.VersionTLS12}
		if c.caFile != "" {
			pem, err := os.ReadFile(c.caFile)
			if err != nil {
				return nil, fmt.Errorf("--ca: %w", err)
			}
			pool := x509.NewCertPool()
			if !pool.AppendCertsFromPEM(pem) {
				return nil, fmt.Errorf("--ca: %s holds no PEM certificate", c.caFile)
			}
			cfg.RootCAs = pool
		}
		if c.certFile != "" {
			cert, err := tls.LoadX509KeyPair(c.certFile, c.keyFile)
			if err != nil {
				return nil, fmt.Errorf("--cert/--key: %w", err)
			}
			cfg.Certificates = []tls.Certificate{cert}
		}
		creds = credentials.NewTLS(cfg)
	}
	conn, err := grpc.NewClient(addr, append([]grpc.DialOption{grpc.WithTransportCredentials(creds)}, opts...)...)
	if err != nil {
		return nil, fmt.Errorf("--gateway %s: %w", addr, err)
	}
	return conn, nil
}

// ctx adds the bearer token to outgoing calls.
func (c *clientFlags) ctx(ctx context.Context) context.Context {
	tok := c.token
	if tok == "" {
		tok = os.Getenv("PULSEFLEET_TOKEN")
	}
	if tok == "" {
		return ctx
	}
	return metadata.AppendToOutgoingContext(ctx, "authorization", "Bearer "+tok)
}
