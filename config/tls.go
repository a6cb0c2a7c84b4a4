package config

import (
	"crypto/tls"
	"crypto/x509"
	"fmt"
	"os"
	"strings"
)

// TLSServerConfig is TLS for a listener.
type TLSServerConfig struct {
	CertFile string `yaml:"cert_file"`
	KeyFile  string `yaml:"key_file"`
	// ClientCAFile holds the CA certificates that client certificates are
	// verified against.
	ClientCAFile string `yaml:"client_ca_file"`
	// RequireClientCert refuses clients without a certificate signed by a
	// CA in ClientCAFile.
	RequireClientCert bool `yaml:"require_client_cert"`
}

// Enabled reports whether the listener uses TLS.
func (t TLSServerConfig) Enabled() bool { return t.CertFile != "" }

// TLSConfig builds the listener's TLS configuration (TLS 1.2 or later). It
// returns nil and no error when TLS is not enabled.
func (t TLSServerConfig) TLSConfig() (*tls.Config, error) {
	if !t.Enabled() {
		return nil, nil
	}
	cert, err := tls.LoadX509KeyPair(t.CertFile, t.KeyFile)
	if err != nil {
		return nil, fmt.Errorf("config: loading key pair: %w", err)
	}
	cfg := &tls.Config{MinVersion: tls.VersionTLS12, Certificates: []tls.Certificate{cert}}
	if t.ClientCAFile != "" {
		pool, err := loadCAs(t.ClientCAFile)
		if err != nil {
			return nil, fmt.Errorf("config: loading CA certificates: %w", err)
		}
		cfg.ClientCAs = pool
		cfg.ClientAuth = tls.VerifyClientCertIfGiven
		if t.RequireClientCert {
			cfg.ClientAuth = tls.RequireAndVerifyClientCert
		}
	}
	return cfg, nil
}

func (t *TLSServerConfig) validate(ps *problems, key string) {
	switch {
	case t.CertFile != "" && t.KeyFile == "":
		ps.add(key+".key_file", "is required when cert_file is set")
	case t.CertFile == "" && t.KeyFile != "":
		ps.add(key+".cert_file", "is required when key_file is set")
	}
	if t.ClientCAFile != "" && t.CertFile == "" {
		ps.add(key+".client_ca_file", "needs TLS: set cert_file and key_file")
	}
	if t.RequireClientCert && t.ClientCAFile == "" {
		ps.add(key+".require_client_cert", "needs client_ca_file")
	}
}

// checkFiles loads the files so that "config check" finds a bad file.
func (t *TLSServerConfig) checkFiles(ps *problems, key string) {
	if t.CertFile != "" && t.KeyFile != "" {
		if _, err := tls.LoadX509KeyPair(t.CertFile, t.KeyFile); err != nil {
			ps.addErr(key+".cert_file", "loading the certificate and key", err)
		}
	}
	if t.ClientCAFile != "" {
		if _, err := loadCAs(t.ClientCAFile); err != nil {
			ps.addErr(key+".client_ca_file", "loading CA certificates", err)
		}
	}
}

// TLSClientConfig is TLS for an outgoing connection.
type TLSClientConfig struct {
	Enabled bool `yaml:"enabled"`
	// CAFile holds the CA certificates that verify the server; empty: the
	// system's roots.
	CAFile string `yaml:"ca_file"`
	// CertFile and KeyFile are the client certificate, if the server asks
	// for one.
	CertFile string `yaml:"cert_file"`
	KeyFile  string `yaml:"key_file"`
	// ServerName overrides the name verified in the server's certificate.
	ServerName string `yaml:"server_name"`
}

// TLSConfig builds the client's TLS configuration (TLS 1.2 or later). It
// returns nil and no error when TLS is not enabled.
func (t TLSClientConfig) TLSConfig() (*tls.Config, error) {
	if !t.Enabled {
		return nil, nil
	}
	cfg := &tls.Config{MinVersion: tls.VersionTLS12, ServerName: t.ServerName}
	if t.CAFile != "" {
		pool, err := loadCAs(t.CAFile)
		if err != nil {
			return nil, fmt.Errorf("config: loading CA certificates: %w", err)
		}
		cfg.RootCAs = pool
	}
	if t.CertFile != "" {
		cert, err := tls.LoadX509KeyPair(t.CertFile, t.KeyFile)
		if err != nil {
			return nil, fmt.Errorf("config: loading key pair: %w", err)
		}
		cfg.Certificates = []tls.Certificate{cert}
	}
	return cfg, nil
}

func (t *TLSClientConfig) validate(ps *problems, key string) {
	if !t.Enabled {
		var set []string
		for _, f := range []struct{ name, v string }{
			{"ca_file", t.CAFile}, {"cert_file", t.CertFile}, {"key_file", t.KeyFile}, {"server_name", t.ServerName},
		} {
			if f.v != "" {
				set = append(set, f.name)
			}
		}
		if len(set) > 0 {
			ps.add(key+".enabled", "is false but %s %s set; set enabled: true to use TLS, or remove them",
				strings.Join(set, ", "), map[bool]string{true: "is", false: "are"}[len(set) == 1])
		}
		return
	}
	switch {
	case t.CertFile != "" && t.KeyFile == "":
		ps.add(key+".key_file", "is required when cert_file is set")
	case t.CertFile == "" && t.KeyFile != "":
		ps.add(key+".cert_file", "is required when key_file is set")
	}
}

func (t *TLSClientConfig) checkFiles(ps *problems, key string) {
	if !t.Enabled {
		return
	}
	if t.CAFile != "" {
		if _, err := loadCAs(t.CAFile); err != nil {
			ps.addErr(key+".ca_file", "loading CA certificates", err)
		}
	}
	if t.CertFile != "" && t.KeyFile != "" {
		if _, err := tls.LoadX509KeyPair(t.CertFile, t.KeyFile); err != nil {
			ps.addErr(key+".cert_file", "loading the certificate and key", err)
		}
	}
}

// loadCAs reads a PEM file of CA certificates.
func loadCAs(path string) (*x509.CertPool, error) {
	data, err := os.ReadFile(path)
	if err != nil {
		return nil, err
	}
	pool := x509.NewCertPool()
	if !pool.AppendCertsFromPEM(data) {
		return nil, fmt.Errorf("no PEM certificate found in %s", path)
	}
	return pool, nil
}
