package app

import (
	"context"
	"crypto/tls"
	"crypto/x509"
	"fmt"
	"net/http"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/stretchr/testify/require"

	"filtrate/hl7v2"
	"filtrate/hl7v2/mllp"
)

// The test certificates of package config (a private CA, server and client
// certificates for 127.0.0.1; test use only).
func tlsFile(t *testing.T, name string) string {
	t.Helper()
	p, err := filepath.Abs(filepath.Join("..", "..", "config", "testdata", "tls", name))
	require.NoError(t, err)
	return p
}

func clientTLS(t *testing.T, withCert bool) *tls.Config {
	t.Helper()
	pem, err := os.ReadFile(tlsFile(t, "ca.pem"))
	require.NoError(t, err)
	pool := x509.NewCertPool()
	require.True(t, pool.AppendCertsFromPEM(pem))
	c := &tls.Config{RootCAs: pool, ServerName: "127.0.0.1", MinVersion: tls.VersionTLS12}
	if withCert {
		cert, err := tls.LoadX509KeyPair(tlsFile(t, "client.pem"), tlsFile(t, "client.key"))
		require.NoError(t, err)
		c.Certificates = []tls.Certificate{cert}
	}
	return c
}

// Both listeners speak TLS and require client certificates; a verified
// client certificate also authenticates the admin endpoints.
func TestTLSWithClientCertificates(t *testing.T) {
	dir := t.TempDir()
	tlsBlock := fmt.Sprintf(`
    cert_file: %s
    key_file: %s
    client_ca_file: %s
    require_client_cert: true`, tlsFile(t, "server.pem"), tlsFile(t, "server.key"), tlsFile(t, "ca.pem"))
	path := filepath.Join(dir, "filtrate.yml")
	require.NoError(t, os.WriteFile(path, []byte(fmt.Sprintf(`store: file:%s
hl7v2:
  listen: 127.0.0.1:0
  tls:%s
http:
  listen: 127.0.0.1:0
  tls:%s
`, filepath.Join(dir, "t.db"), tlsBlock, tlsBlock)), 0o644))
	r := startFromFile(t, path, nil)

	// HTTPS with a client certificate: served, and the admin endpoint
	// accepts the certificate as authentication.
	withCert := &http.Client{Transport: &http.Transport{TLSClientConfig: clientTLS(t, true)}}
	resp, err := withCert.Get("https://" + r.app.HTTPAddr() + "/healthz")
	require.NoError(t, err)
	resp.Body.Close()
	require.Equal(t, http.StatusOK, resp.StatusCode)
	resp, err = withCert.Post("https://"+r.app.HTTPAddr()+"/-/reload", "text/plain", nil)
	require.NoError(t, err)
	resp.Body.Close()
	require.Equal(t, http.StatusOK, resp.StatusCode)

	// Without one, or in plain HTTP, the handshake fails.
	noCert := &http.Client{Transport: &http.Transport{TLSClientConfig: clientTLS(t, false)}}
	_, err = noCert.Get("https://" + r.app.HTTPAddr() + "/healthz")
	require.Error(t, err)
	if resp, err := http.Get("http://" + r.app.HTTPAddr() + "/healthz"); err == nil {
		resp.Body.Close()
		require.Equal(t, http.StatusBadRequest, resp.StatusCode, "plain HTTP is not served")
	}

	// MLLP over TLS with a client certificate: AA.
	c, err := mllp.Dial(context.Background(), r.app.HL7Addr(), mllp.ClientOptions{TLSConfig: clientTLS(t, true)})
	require.NoError(t, err)
	raw, err := c.Send(context.Background(), []byte(strings.ReplaceAll(oru("S1", "P1", "1.0"), "\n", "\r")))
	require.NoError(t, err)
	c.Close()
	ack, err := hl7v2.ParseACK(raw)
	require.NoError(t, err)
	require.Equal(t, "AA", ack.Code)

	// Without a client certificate the MLLP session fails.
	c, err = mllp.Dial(context.Background(), r.app.HL7Addr(), mllp.ClientOptions{TLSConfig: clientTLS(t, false)})
	if err == nil {
		_, err = c.Send(context.Background(), []byte(strings.ReplaceAll(oru("S2", "P1", "1.0"), "\n", "\r")))
		c.Close()
	}
	require.Error(t, err)
}
