package cli

import (
	"fmt"
	"os"
	"path/filepath"
	"strings"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
	"go.uber.org/zap"

	"baton/deploy/shell"
)

// secureFleet is what `sim fleet --secure` runs a fleet with, as on a
// site: an nkey and publish permissions per process (what `sim creds`
// writes) and TLS to the NATS server, with a throwaway CA.
type secureFleet struct {
	dir  string
	pki  shell.PKI
	opts *server.Options // the server's authorization and TLS, parsed from its configuration
}

// makeSecure writes the fleet's identities, certificates and server
// configuration into dir, and loads the configuration as a server would.
func makeSecure(dir, prefix, fleet string, robots int) (*secureFleet, error) {
	ids, err := shell.FleetIdentities(prefix, fleet, robots)
	if err != nil {
		return nil, err
	}
	creds := filepath.Join(dir, "creds")
	if err := shell.WriteFleetCredentials(creds, ids); err != nil {
		return nil, err
	}
	pki, err := shell.MakePKI(filepath.Join(dir, "tls"), []string{"127.0.0.1"}, 30*24*time.Hour)
	if err != nil {
		return nil, err
	}
	slash := func(p string) string { return strings.ReplaceAll(p, `\`, `/`) }
	conf := filepath.Join(dir, "server.conf")
	text := fmt.Sprintf("include %q\ntls {\n  cert_file: %q\n  key_file: %q\n  timeout: 2\n}\n",
		"creds/authorization.conf", slash(pki.ServerCert), slash(pki.ServerKey))
	if err := os.WriteFile(conf, []byte(text), 0o600); err != nil {
		return nil, err
	}
	opts, err := server.ProcessConfigFile(conf)
	if err != nil {
		return nil, fmt.Errorf("the fleet's server configuration %s: %w", conf, err)
	}
	return &secureFleet{dir: dir, pki: pki, opts: opts}, nil
}

// set gives an embedded server the configuration's authorization and TLS.
func (s *secureFleet) set(o *server.Options) {
	o.Nkeys, o.Users = s.opts.Nkeys, s.opts.Users
	o.TLS, o.TLSConfig, o.TLSTimeout, o.TLSVerify = s.opts.TLS, s.opts.TLSConfig, s.opts.TLSTimeout, s.opts.TLSVerify
}

// args are the daemon flags for identity name ("coordinator", "robot-3").
func (s *secureFleet) args(name string) []string {
	return []string{"--creds", filepath.Join(s.dir, "creds", name+".nk"), "--tls-ca", s.pki.CA}
}

// connect is the simulator's own connection (as the coordinator's
// identity: it reads the durable log).
func (s *secureFleet) connect(url string) (*nats.Conn, error) {
	return shell.Connect(url, filepath.Join(s.dir, "creds", "coordinator.nk"), "sim", 10*time.Second, zap.NewNop(), nats.RootCAs(s.pki.CA))
}
