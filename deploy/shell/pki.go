package shell

import (
	"crypto/ecdsa"
	"crypto/elliptic"
	"crypto/rand"
	"crypto/x509"
	"crypto/x509/pkix"
	"encoding/pem"
	"fmt"
	"math/big"
	"net"
	"os"
	"path/filepath"
	"time"
)

// PKI is a throwaway certificate authority and the certificates it signed,
// as PEM files: for tests, `sim fleet --secure` and labs. A site's
// certificates come from its own CA (deploy/GUIDE.md).
type PKI struct {
	CA                    string // the CA's certificate
	ServerCert, ServerKey string // for the NATS servers, valid for hosts
	ClientCert, ClientKey string // one client certificate, for servers that verify clients
}

// MakePKI writes a new CA and certificates into dir (ca.pem, server.pem,
// server-key.pem, client.pem, client-key.pem; keys mode 0600), valid from
// an hour ago for validFor, the server's for the given IP addresses or
// host names.
func MakePKI(dir string, hosts []string, validFor time.Duration) (PKI, error) {
	if err := os.MkdirAll(dir, 0o700); err != nil {
		return PKI{}, err
	}
	from, until := time.Now().Add(-time.Hour), time.Now().Add(validFor)
	caKey, err := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
	if err != nil {
		return PKI{}, err
	}
	caTmpl := &x509.Certificate{SerialNumber: big.NewInt(1), Subject: pkix.Name{CommonName: "baton throwaway CA"},
		NotBefore: from, NotAfter: until, IsCA: true, BasicConstraintsValid: true, KeyUsage: x509.KeyUsageCertSign}
	caDER, err := x509.CreateCertificate(rand.Reader, caTmpl, caTmpl, &caKey.PublicKey, caKey)
	if err != nil {
		return PKI{}, err
	}
	caCert, err := x509.ParseCertificate(caDER)
	if err != nil {
		return PKI{}, err
	}
	var werr error
	write := func(name, kind string, der []byte) string {
		p := filepath.Join(dir, name)
		if err := os.WriteFile(p, pem.EncodeToMemory(&pem.Block{Type: kind, Bytes: der}), 0o600); err != nil && werr == nil {
			werr = err
		}
		return p
	}
	leaf := func(name string, serial int64, usage x509.ExtKeyUsage) (string, string, error) {
		k, err := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
		if err != nil {
			return "", "", err
		}
		tmpl := &x509.Certificate{SerialNumber: big.NewInt(serial), Subject: pkix.Name{CommonName: name},
			NotBefore: from, NotAfter: until, KeyUsage: x509.KeyUsageDigitalSignature, ExtKeyUsage: []x509.ExtKeyUsage{usage}}
		if usage == x509.ExtKeyUsageServerAuth {
			for _, h := range hosts {
				if ip := net.ParseIP(h); ip != nil {
					tmpl.IPAddresses = append(tmpl.IPAddresses, ip)
				} else {
					tmpl.DNSNames = append(tmpl.DNSNames, h)
				}
			}
		}
		der, err := x509.CreateCertificate(rand.Reader, tmpl, caCert, &k.PublicKey, caKey)
		if err != nil {
			return "", "", err
		}
		kder, err := x509.MarshalECPrivateKey(k)
		if err != nil {
			return "", "", err
		}
		return write(name+".pem", "CERTIFICATE", der), write(name+"-key.pem", "EC PRIVATE KEY", kder), nil
	}
	var p PKI
	p.CA = write("ca.pem", "CERTIFICATE", caDER)
	if p.ServerCert, p.ServerKey, err = leaf("server", 2, x509.ExtKeyUsageServerAuth); err != nil {
		return PKI{}, err
	}
	if p.ClientCert, p.ClientKey, err = leaf("client", 3, x509.ExtKeyUsageClientAuth); err != nil {
		return PKI{}, err
	}
	if werr != nil {
		return PKI{}, fmt.Errorf("writing certificates to %s: %w", dir, werr)
	}
	return p, nil
}
