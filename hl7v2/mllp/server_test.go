package mllp

import (
	"context"
	"crypto/ecdsa"
	"crypto/elliptic"
	"crypto/rand"
	"crypto/tls"
	"crypto/x509"
	"crypto/x509/pkix"
	"errors"
	"fmt"
	"io"
	"math/big"
	"net"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"github.com/stretchr/testify/require"
)

// echo answers every payload with "ACK:" + payload.
var echo = HandlerFunc(func(_ context.Context, p []byte) []byte {
	return append([]byte("ACK:"), p...)
})

// start serves s on 127.0.0.1:0 and returns the address. The server is
// closed when the test ends.
func start(t *testing.T, s *Server) string {
	t.Helper()
	l, err := net.Listen("tcp", "127.0.0.1:0")
	require.NoError(t, err)
	served := make(chan error, 1)
	go func() { served <- s.Serve(l) }()
	t.Cleanup(func() {
		s.Close()
		require.ErrorIs(t, <-served, ErrServerClosed)
	})
	return l.Addr().String()
}

func dial(t *testing.T, addr string, opts ClientOptions) *Client {
	t.Helper()
	c, err := Dial(context.Background(), addr, opts)
	require.NoError(t, err)
	t.Cleanup(func() { c.Close() })
	return c
}

func TestSendAndReceive(t *testing.T) {
	addr := start(t, &Server{Handler: echo})
	c := dial(t, addr, ClientOptions{})
	for i := range 3 {
		msg := fmt.Sprintf("MSH|^~\\&|m%d\r", i)
		ack, err := c.Send(context.Background(), []byte(msg))
		require.NoError(t, err)
		require.Equal(t, "ACK:"+msg, string(ack))
	}
}

func TestConcurrentConnections(t *testing.T) {
	var inflight, peak atomic.Int32
	gate := make(chan struct{})
	h := HandlerFunc(func(ctx context.Context, p []byte) []byte {
		n := inflight.Add(1)
		for {
			old := peak.Load()
			if n <= old || peak.CompareAndSwap(old, n) {
				break
			}
		}
		if n == 4 {
			close(gate) // all four connections are being served at once
		}
		<-gate
		inflight.Add(-1)
		return echo(ctx, p)
	})
	addr := start(t, &Server{Handler: h})
	var wg sync.WaitGroup
	for i := range 4 {
		c := dial(t, addr, ClientOptions{})
		wg.Add(1)
		go func() {
			defer wg.Done()
			msg := fmt.Sprintf("c%d", i)
			ack, err := c.Send(context.Background(), []byte(msg))
			require.NoError(t, err)
			require.Equal(t, "ACK:"+msg, string(ack))
		}()
	}
	wg.Wait()
	require.Equal(t, int32(4), peak.Load())
}

func TestOversizedFrame(t *testing.T) {
	t.Run("answered by the oversize handler", func(t *testing.T) {
		var head []byte
		s := &Server{Handler: echo, MaxFrameBytes: 16, OversizeHandler: HandlerFunc(func(_ context.Context, p []byte) []byte {
			head = append([]byte(nil), p...)
			return []byte("AR")
		})}
		c := dial(t, start(t, s), ClientOptions{})
		ack, err := c.Send(context.Background(), []byte("MSH|^~\\&|0123456789abcdef"))
		require.NoError(t, err)
		require.Equal(t, "AR", string(ack))
		require.Equal(t, "MSH|^~\\&|0123456", string(head))
		// The connection is still usable.
		ack, err = c.Send(context.Background(), []byte("small"))
		require.NoError(t, err)
		require.Equal(t, "ACK:small", string(ack))
	})
	t.Run("connection closed without an oversize handler", func(t *testing.T) {
		c := dial(t, start(t, &Server{Handler: echo, MaxFrameBytes: 16}), ClientOptions{})
		_, err := c.Send(context.Background(), []byte("MSH|^~\\&|0123456789abcdef"))
		require.Error(t, err)
		require.True(t, IsRetryable(err))
	})
}

func TestClientRejectsOversizedAnswer(t *testing.T) {
	c := dial(t, start(t, &Server{Handler: echo}), ClientOptions{MaxFrameBytes: 8})
	_, err := c.Send(context.Background(), []byte("0123456789"))
	require.ErrorIs(t, err, ErrFrameTooLarge)
	require.False(t, IsRetryable(err))
}

func TestMaxConns(t *testing.T) {
	addr := start(t, &Server{Handler: echo, MaxConns: 1})
	first := dial(t, addr, ClientOptions{})
	_, err := first.Send(context.Background(), []byte("one"))
	require.NoError(t, err)

	// The second connection is accepted by the kernel and closed by the
	// server at once.
	raw, err := net.Dial("tcp", addr)
	require.NoError(t, err)
	defer raw.Close()
	_, err = raw.Read(make([]byte, 1))
	require.ErrorIs(t, err, io.EOF)

	// The first connection is unaffected.
	ack, err := first.Send(context.Background(), []byte("two"))
	require.NoError(t, err)
	require.Equal(t, "ACK:two", string(ack))
}

func TestTimeoutsCloseConnections(t *testing.T) {
	t.Run("idle", func(t *testing.T) {
		addr := start(t, &Server{Handler: echo, IdleTimeout: 20 * time.Millisecond})
		raw, err := net.Dial("tcp", addr)
		require.NoError(t, err)
		defer raw.Close()
		_, err = raw.Read(make([]byte, 1))
		require.ErrorIs(t, err, io.EOF)
	})
	t.Run("partial frame", func(t *testing.T) {
		addr := start(t, &Server{Handler: echo, ReadTimeout: 20 * time.Millisecond})
		raw, err := net.Dial("tcp", addr)
		require.NoError(t, err)
		defer raw.Close()
		_, err = raw.Write([]byte("\x0bMSH|never finished"))
		require.NoError(t, err)
		_, err = raw.Read(make([]byte, 1))
		require.ErrorIs(t, err, io.EOF)
	})
}

func TestHandlerFailures(t *testing.T) {
	h := HandlerFunc(func(ctx context.Context, p []byte) []byte {
		switch string(p) {
		case "panic":
			panic("handler bug")
		case "nil":
			return nil
		}
		return echo(ctx, p)
	})
	addr := start(t, &Server{Handler: h})
	for _, p := range []string{"panic", "nil"} {
		c := dial(t, addr, ClientOptions{})
		_, err := c.Send(context.Background(), []byte(p))
		require.Error(t, err, p)
		require.True(t, IsRetryable(err), p)
		// The server keeps serving, and the client reconnects.
		ack, err := c.Send(context.Background(), []byte("ok"))
		require.NoError(t, err)
		require.Equal(t, "ACK:ok", string(ack))
	}
}

// closeNotifyListener reports every accepted connection's Close.
type closeNotifyListener struct {
	net.Listener
	accepted atomic.Int32
	closed   chan struct{}
}

func (l *closeNotifyListener) Accept() (net.Conn, error) {
	c, err := l.Listener.Accept()
	if err != nil {
		return nil, err
	}
	l.accepted.Add(1)
	return &notifyConn{Conn: c, closed: l.closed}, nil
}

type notifyConn struct {
	net.Conn
	once   sync.Once
	closed chan struct{}
}

func (c *notifyConn) Close() error {
	c.once.Do(func() { c.closed <- struct{}{} })
	return c.Conn.Close()
}

func TestClientReconnectsAfterServerClosedIdleConnection(t *testing.T) {
	inner, err := net.Listen("tcp", "127.0.0.1:0")
	require.NoError(t, err)
	l := &closeNotifyListener{Listener: inner, closed: make(chan struct{}, 4)}
	s := &Server{Handler: echo, IdleTimeout: 10 * time.Millisecond}
	go s.Serve(l)
	defer s.Close()

	c := dial(t, inner.Addr().String(), ClientOptions{})
	c.stale = 0 // check the connection before every send
	_, err = c.Send(context.Background(), []byte("first"))
	require.NoError(t, err)
	<-l.closed // the server dropped the idle connection

	ack, err := c.Send(context.Background(), []byte("second"))
	require.NoError(t, err)
	require.Equal(t, "ACK:second", string(ack))
	require.Equal(t, int32(2), l.accepted.Load())
}

func TestShutdownFinishesInFlightMessages(t *testing.T) {
	entered, release := make(chan struct{}), make(chan struct{})
	h := HandlerFunc(func(ctx context.Context, p []byte) []byte {
		if string(p) == "slow" {
			close(entered)
			<-release
		}
		return echo(ctx, p)
	})
	l, err := net.Listen("tcp", "127.0.0.1:0")
	require.NoError(t, err)
	s := &Server{Handler: h}
	served := make(chan error, 1)
	go func() { served <- s.Serve(l) }()
	addr := l.Addr().String()

	idle := dial(t, addr, ClientOptions{})
	_, err = idle.Send(context.Background(), []byte("warm-up"))
	require.NoError(t, err)

	busy := dial(t, addr, ClientOptions{})
	result := make(chan string, 1)
	go func() {
		ack, err := busy.Send(context.Background(), []byte("slow"))
		if err != nil {
			result <- "error: " + err.Error()
			return
		}
		result <- string(ack)
	}()
	<-entered

	shut := make(chan error, 1)
	go func() { shut <- s.Shutdown(context.Background()) }()
	require.ErrorIs(t, <-served, ErrServerClosed, "listener closed first")
	_, err = net.Dial("tcp", addr)
	require.Error(t, err, "no new connections")

	close(release)
	require.Equal(t, "ACK:slow", <-result, "the in-flight message is answered")
	require.NoError(t, <-shut)

	_, err = idle.Send(context.Background(), []byte("late"))
	require.Error(t, err, "idle connections were closed")
	require.NoError(t, s.Shutdown(context.Background()), "a second Shutdown is harmless")
	require.NoError(t, s.Close())
}

func TestShutdownDeadlineCancelsHandlers(t *testing.T) {
	entered, cancelled := make(chan struct{}), make(chan struct{})
	h := HandlerFunc(func(ctx context.Context, p []byte) []byte {
		close(entered)
		<-ctx.Done()
		close(cancelled)
		return nil
	})
	s := &Server{Handler: h}
	addr := start(t, s)
	c := dial(t, addr, ClientOptions{})
	sent := make(chan error, 1)
	go func() {
		_, err := c.Send(context.Background(), []byte("stuck"))
		sent <- err
	}()
	<-entered
	ctx, cancel := context.WithCancel(context.Background())
	cancel() // the grace period is already over
	require.ErrorIs(t, s.Shutdown(ctx), context.Canceled)
	<-cancelled // the handler saw its context end
	err := <-sent
	require.Error(t, err)
	require.True(t, IsRetryable(err), "the message was not acknowledged; send it again")
}

func TestShutdownBeforeServe(t *testing.T) {
	s := &Server{Handler: echo}
	require.NoError(t, s.Shutdown(context.Background()))
	l, err := net.Listen("tcp", "127.0.0.1:0")
	require.NoError(t, err)
	require.ErrorIs(t, s.Serve(l), ErrServerClosed)
	require.Error(t, (&Server{}).Serve(l), "a handler is required")
}

// testPKI is a certificate authority with a server certificate for
// 127.0.0.1 and a client certificate, generated for one test run.
type testPKI struct {
	pool   *x509.CertPool
	server tls.Certificate
	client tls.Certificate
}

func newTestPKI(t *testing.T) testPKI {
	t.Helper()
	now := time.Now()
	caKey, err := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
	require.NoError(t, err)
	caTmpl := &x509.Certificate{
		SerialNumber:          big.NewInt(1),
		Subject:               pkix.Name{CommonName: "Northfield Valley Laboratory test CA"},
		NotBefore:             now.Add(-time.Hour),
		NotAfter:              now.Add(time.Hour),
		IsCA:                  true,
		KeyUsage:              x509.KeyUsageCertSign,
		BasicConstraintsValid: true,
	}
	caDER, err := x509.CreateCertificate(rand.Reader, caTmpl, caTmpl, &caKey.PublicKey, caKey)
	require.NoError(t, err)
	ca, err := x509.ParseCertificate(caDER)
	require.NoError(t, err)
	pool := x509.NewCertPool()
	pool.AddCert(ca)

	leaf := func(serial int64, cn string, usage x509.ExtKeyUsage) tls.Certificate {
		key, err := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
		require.NoError(t, err)
		tmpl := &x509.Certificate{
			SerialNumber: big.NewInt(serial),
			Subject:      pkix.Name{CommonName: cn},
			NotBefore:    now.Add(-time.Hour),
			NotAfter:     now.Add(time.Hour),
			KeyUsage:     x509.KeyUsageDigitalSignature,
			ExtKeyUsage:  []x509.ExtKeyUsage{usage},
			IPAddresses:  []net.IP{net.ParseIP("127.0.0.1")},
		}
		der, err := x509.CreateCertificate(rand.Reader, tmpl, ca, &key.PublicKey, caKey)
		require.NoError(t, err)
		return tls.Certificate{Certificate: [][]byte{der}, PrivateKey: key}
	}
	return testPKI{
		pool:   pool,
		server: leaf(2, "mllp.nvl.test", x509.ExtKeyUsageServerAuth),
		client: leaf(3, "lis.nvl.test", x509.ExtKeyUsageClientAuth),
	}
}

func TestTLSWithClientCertificates(t *testing.T) {
	pki := newTestPKI(t)
	var peer atomic.Value
	h := HandlerFunc(func(ctx context.Context, p []byte) []byte { return echo(ctx, p) })
	s := &Server{Handler: h, TLSConfig: &tls.Config{
		Certificates: []tls.Certificate{pki.server},
		ClientAuth:   tls.RequireAndVerifyClientCert,
		ClientCAs:    pki.pool,
		MinVersion:   tls.VersionTLS12,
		VerifyConnection: func(cs tls.ConnectionState) error {
			if len(cs.PeerCertificates) > 0 {
				peer.Store(cs.PeerCertificates[0].Subject.CommonName)
			}
			return nil
		},
	}}
	addr := start(t, s)

	t.Run("trusted client certificate", func(t *testing.T) {
		c := dial(t, addr, ClientOptions{TLSConfig: &tls.Config{RootCAs: pki.pool, Certificates: []tls.Certificate{pki.client}}})
		ack, err := c.Send(context.Background(), []byte("secure"))
		require.NoError(t, err)
		require.Equal(t, "ACK:secure", string(ack))
		require.Equal(t, "lis.nvl.test", peer.Load())
	})
	t.Run("no client certificate", func(t *testing.T) {
		// With TLS 1.3 the client learns of the rejection only when it
		// reads, so the error may come from Dial or from Send.
		c, err := Dial(context.Background(), addr, ClientOptions{TLSConfig: &tls.Config{RootCAs: pki.pool}})
		if err == nil {
			defer c.Close()
			_, err = c.Send(context.Background(), []byte("x"))
		}
		require.Error(t, err)
		require.False(t, IsRetryable(err), "%v", err)
	})
	t.Run("server not trusted", func(t *testing.T) {
		_, err := Dial(context.Background(), addr, ClientOptions{TLSConfig: &tls.Config{Certificates: []tls.Certificate{pki.client}}})
		require.Error(t, err)
		require.False(t, IsRetryable(err), "%v", err)
		var e *Error
		require.True(t, errors.As(err, &e))
		require.Equal(t, "dial", e.Op)
	})
	t.Run("plain TCP client", func(t *testing.T) {
		// Long enough for the server to see a non-TLS record header at once.
		c := dial(t, addr, ClientOptions{})
		_, err := c.Send(context.Background(), []byte("MSH|^~\\&|plain"))
		require.Error(t, err)
	})
}

func TestClientErrors(t *testing.T) {
	t.Run("connection refused is retryable", func(t *testing.T) {
		l, err := net.Listen("tcp", "127.0.0.1:0")
		require.NoError(t, err)
		addr := l.Addr().String()
		l.Close()
		_, err = Dial(context.Background(), addr, ClientOptions{})
		require.Error(t, err)
		require.True(t, IsRetryable(err))
	})

	block := make(chan struct{})
	t.Cleanup(func() { close(block) })
	slow := HandlerFunc(func(ctx context.Context, p []byte) []byte {
		select {
		case <-block:
		case <-ctx.Done():
		}
		return nil
	})
	addr := start(t, &Server{Handler: slow})

	t.Run("ack time-out is retryable", func(t *testing.T) {
		c := dial(t, addr, ClientOptions{AckTimeout: 20 * time.Millisecond})
		_, err := c.Send(context.Background(), []byte("x"))
		require.True(t, IsRetryable(err), "%v", err)
		var ne net.Error
		require.True(t, errors.As(err, &ne) && ne.Timeout())
	})
	t.Run("context deadline is retryable", func(t *testing.T) {
		c := dial(t, addr, ClientOptions{})
		ctx, cancel := context.WithTimeout(context.Background(), 20*time.Millisecond)
		defer cancel()
		_, err := c.Send(ctx, []byte("x"))
		require.ErrorIs(t, err, context.DeadlineExceeded)
		require.True(t, IsRetryable(err))
	})
	t.Run("cancelled context is not retryable", func(t *testing.T) {
		c := dial(t, addr, ClientOptions{})
		ctx, cancel := context.WithCancel(context.Background())
		go func() {
			// Cancel once the send is under way; the outcome does not
			// depend on the moment.
			cancel()
		}()
		_, err := c.Send(ctx, []byte("x"))
		require.ErrorIs(t, err, context.Canceled)
		require.False(t, IsRetryable(err))
	})
	t.Run("closed client is not retryable", func(t *testing.T) {
		c := dial(t, addr, ClientOptions{})
		require.NoError(t, c.Close())
		_, err := c.Send(context.Background(), []byte("x"))
		require.ErrorIs(t, err, ErrClientClosed)
		require.False(t, IsRetryable(err))
	})
}

func TestErrorText(t *testing.T) {
	err := &Error{Op: "read", Retryable: true, Err: io.ErrUnexpectedEOF}
	require.Equal(t, "mllp: read: unexpected EOF", err.Error())
	require.ErrorIs(t, fmt.Errorf("forward: %w", err), io.ErrUnexpectedEOF)
	require.False(t, IsRetryable(io.EOF), "only *Error is classified")
}

func BenchmarkSend(b *testing.B) {
	l, err := net.Listen("tcp", "127.0.0.1:0")
	require.NoError(b, err)
	s := &Server{Handler: echo}
	go s.Serve(l)
	defer s.Close()
	c, err := Dial(context.Background(), l.Addr().String(), ClientOptions{})
	require.NoError(b, err)
	defer c.Close()
	msg := []byte("MSH|^~\\&|NVLAB|NVL|EHR|NVH|20250314093000||ORU^R01|1|P|2.5.1\r")
	b.ReportAllocs()
	for b.Loop() {
		if _, err := c.Send(context.Background(), msg); err != nil {
			b.Fatal(err)
		}
	}
}
