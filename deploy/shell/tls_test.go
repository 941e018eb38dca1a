package shell

import (
	"testing"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
	"go.uber.org/zap"
)

// testPKI makes, at test time, a CA and a certificate it signs for
// 127.0.0.1, written as PEM files into dir.
func testPKI(t *testing.T, dir string) (ca, srvCert, srvKey, cliCert, cliKey string) {
	t.Helper()
	p, err := MakePKI(dir, []string{"127.0.0.1"}, time.Hour)
	if err != nil {
		t.Fatal(err)
	}
	return p.CA, p.ServerCert, p.ServerKey, p.ClientCert, p.ClientKey
}

// With TLS on at the server (client certificates verified), the daemons'
// connection with --tls-ca/--tls-cert/--tls-key works and a plaintext or
// certificate-less client is refused.
func TestTLS(t *testing.T) {
	dir := t.TempDir()
	ca, srvCert, srvKey, cliCert, cliKey := testPKI(t, dir)
	tc, err := server.GenTLSConfig(&server.TLSConfigOpts{CertFile: srvCert, KeyFile: srvKey, CaFile: ca, Verify: true})
	if err != nil {
		t.Fatal(err)
	}
	url := runServer(t, &server.Options{Host: "127.0.0.1", Port: -1, TLSConfig: tc, TLSVerify: true, TLSTimeout: 2})
	if nc, err := nats.Connect(url, nats.MaxReconnects(0)); err == nil {
		nc.Close()
		t.Fatal("a plaintext client connected")
	}
	if nc, err := nats.Connect(url, nats.MaxReconnects(0), nats.RootCAs(ca)); err == nil {
		nc.Close()
		t.Fatal("a client without a certificate connected")
	}
	c := Common{TLSCA: ca, TLSCert: cliCert, TLSKey: cliKey}
	opts, err := c.TLSOptions()
	if err != nil {
		t.Fatal(err)
	}
	nc, err := Connect(url, "", "robot-0", 3*time.Second, zap.NewNop(), opts...)
	if err != nil {
		t.Fatalf("the daemons' TLS options: %v", err)
	}
	defer nc.Close()
	if !nc.IsConnected() || nc.TLSRequired() == false {
		t.Fatal("not connected over TLS")
	}
	if _, err := (&Common{TLSCert: cliCert}).TLSOptions(); err == nil {
		t.Fatal("--tls-cert without --tls-key accepted")
	}
}

// runServer starts a NATS server in-process for the test and returns its
// client URL; it stops with the test.
func runServer(t *testing.T, opts *server.Options) string {
	return startServer(t, opts).ClientURL()
}

// startServer starts a NATS server in-process; it stops with the test.
func startServer(t *testing.T, opts *server.Options) *server.Server {
	t.Helper()
	opts.NoLog, opts.NoSigs = true, true
	ns, err := server.NewServer(opts)
	if err != nil {
		t.Fatal(err)
	}
	go ns.Start()
	t.Cleanup(ns.Shutdown)
	if !ns.ReadyForConnections(10 * time.Second) {
		t.Fatal("server not ready")
	}
	return ns
}
