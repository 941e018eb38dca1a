package shell

import (
	"crypto/ecdsa"
	"crypto/elliptic"
	"crypto/rand"
	"crypto/x509"
	"crypto/x509/pkix"
	"encoding/pem"
	"math/big"
	"net"
	"os"
	"path/filepath"
	"testing"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
	"go.uber.org/zap"
)

// testPKI makes, at test time, a CA and a certificate it signs for
// 127.0.0.1, written as PEM files into dir: name.pem and name-key.pem.
func testPKI(t *testing.T, dir string) (ca, srvCert, srvKey, cliCert, cliKey string) {
	t.Helper()
	caKey, _ := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
	caTmpl := &x509.Certificate{SerialNumber: big.NewInt(1), Subject: pkix.Name{CommonName: "baton test CA"},
		NotBefore: time.Now().Add(-time.Hour), NotAfter: time.Now().Add(time.Hour), IsCA: true, BasicConstraintsValid: true,
		KeyUsage: x509.KeyUsageCertSign}
	caDER, err := x509.CreateCertificate(rand.Reader, caTmpl, caTmpl, &caKey.PublicKey, caKey)
	if err != nil {
		t.Fatal(err)
	}
	caCert, _ := x509.ParseCertificate(caDER)
	write := func(name, kind string, der []byte) string {
		p := filepath.Join(dir, name)
		if err := os.WriteFile(p, pem.EncodeToMemory(&pem.Block{Type: kind, Bytes: der}), 0o600); err != nil {
			t.Fatal(err)
		}
		return p
	}
	leaf := func(name string, serial int64, usage x509.ExtKeyUsage) (string, string) {
		k, _ := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
		tmpl := &x509.Certificate{SerialNumber: big.NewInt(serial), Subject: pkix.Name{CommonName: name},
			NotBefore: time.Now().Add(-time.Hour), NotAfter: time.Now().Add(time.Hour), IPAddresses: []net.IP{net.ParseIP("127.0.0.1")},
			KeyUsage: x509.KeyUsageDigitalSignature, ExtKeyUsage: []x509.ExtKeyUsage{usage}}
		der, err := x509.CreateCertificate(rand.Reader, tmpl, caCert, &k.PublicKey, caKey)
		if err != nil {
			t.Fatal(err)
		}
		kder, _ := x509.MarshalECPrivateKey(k)
		return write(name+".pem", "CERTIFICATE", der), write(name+"-key.pem", "EC PRIVATE KEY", kder)
	}
	ca = write("ca.pem", "CERTIFICATE", caDER)
	srvCert, srvKey = leaf("server", 2, x509.ExtKeyUsageServerAuth)
	cliCert, cliKey = leaf("client", 3, x509.ExtKeyUsageClientAuth)
	return
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
	return ns.ClientURL()
}
