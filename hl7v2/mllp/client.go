package mllp

import (
	"bufio"
	"context"
	"crypto/tls"
	"crypto/x509"
	"errors"
	"io"
	"net"
	"os"
	"sync"
	"time"
)

// Error is the error type of the client. Retryable reports whether sending
// the same message again may succeed: true for connection failures and
// time-outs, false for configuration problems (certificates), an answer
// above the size limit, a closed client or a cancelled context.
//
// A retryable error after the payload was written means the peer may have
// received the message: MLLP delivery is at least once, and receivers are
// expected to recognise a repeated message control ID.
type Error struct {
	Op        string // "dial", "write", "read" or "send"
	Retryable bool
	Err       error
}

// Error implements error.
func (e *Error) Error() string { return "mllp: " + e.Op + ": " + e.Err.Error() }

// Unwrap returns the cause.
func (e *Error) Unwrap() error { return e.Err }

// IsRetryable reports whether err is an *Error marked retryable.
func IsRetryable(err error) bool {
	var e *Error
	return errors.As(err, &e) && e.Retryable
}

// ErrClientClosed is the cause of errors from a closed Client.
var ErrClientClosed = errors.New("client closed")

// ClientOptions configure a Client. Zero values are defaults.
type ClientOptions struct {
	// TLSConfig, when set, makes the client speak TLS; put a client
	// certificate in it when the server requires one.
	TLSConfig *tls.Config
	// DialTimeout bounds connecting, including the TLS handshake. Default
	// 10 s.
	DialTimeout time.Duration
	// WriteTimeout bounds sending one frame. Default 30 s.
	WriteTimeout time.Duration
	// AckTimeout bounds the wait for the answer after sending. Default 60 s.
	AckTimeout time.Duration
	// MaxFrameBytes limits the answer's payload. Default
	// DefaultMaxFrameBytes.
	MaxFrameBytes int
}

// Client sends messages to one MLLP peer over one connection, one message at
// a time (original acknowledgement mode allows one outstanding message per
// connection). After a failure the connection is dropped, and the next Send
// connects again. A Client is safe for concurrent use; sends are serialised.
type Client struct {
	addr string
	opts ClientOptions
	sem  chan struct{} // held while using conn

	mu       sync.Mutex // guards conn and closed for Close
	conn     net.Conn
	br       *bufio.Reader
	closed   bool
	lastUsed time.Time // end of the last exchange; guarded by sem
	stale    time.Duration
}

// staleAfter is the idle time after which Send checks that the peer has not
// closed the connection before reusing it. Peers close idle connections
// after seconds or minutes; the check costs up to a millisecond.
const staleAfter = 250 * time.Millisecond

// Dial connects to addr ("host:port") and returns a Client.
func Dial(ctx context.Context, addr string, opts ClientOptions) (*Client, error) {
	c := &Client{addr: addr, opts: opts, sem: make(chan struct{}, 1), stale: staleAfter}
	if err := c.connect(ctx); err != nil {
		return nil, err
	}
	return c, nil
}

func (c *Client) connect(ctx context.Context) error {
	ctx, cancel := context.WithTimeout(ctx, durationOr(c.opts.DialTimeout, 10*time.Second))
	defer cancel()
	nd := &net.Dialer{KeepAlive: 30 * time.Second}
	var conn net.Conn
	var err error
	if c.opts.TLSConfig != nil {
		td := &tls.Dialer{NetDialer: nd, Config: c.opts.TLSConfig}
		conn, err = td.DialContext(ctx, "tcp", c.addr)
	} else {
		conn, err = nd.DialContext(ctx, "tcp", c.addr)
	}
	if err != nil {
		return &Error{Op: "dial", Retryable: retryable(ctx, err), Err: err}
	}
	c.mu.Lock()
	defer c.mu.Unlock()
	if c.closed {
		conn.Close()
		return &Error{Op: "dial", Err: ErrClientClosed}
	}
	c.conn, c.br = conn, bufio.NewReaderSize(conn, 32<<10)
	c.lastUsed = time.Now()
	return nil
}

// drop closes the current connection after a failure.
func (c *Client) drop() {
	c.mu.Lock()
	defer c.mu.Unlock()
	if c.conn != nil {
		c.conn.Close()
		c.conn, c.br = nil, nil
	}
}

// alive checks that a reused connection has not been closed by the peer and
// holds no unexpected bytes. It waits at most a millisecond: a deadline
// already in the past would fail the read before looking at the socket.
func alive(conn net.Conn, br *bufio.Reader) bool {
	if br.Buffered() > 0 {
		return false
	}
	if err := conn.SetReadDeadline(time.Now().Add(time.Millisecond)); err != nil {
		return false
	}
	_, err := br.Peek(1)
	var ne net.Error
	return err != nil && errors.As(err, &ne) && ne.Timeout()
}

// Send sends payload in one frame and returns the payload of the answering
// frame. It connects first if the previous connection failed, or, when the
// connection has been idle for a while, if the peer has closed it. Errors are
// of type *Error.
func (c *Client) Send(ctx context.Context, payload []byte) ([]byte, error) {
	select {
	case c.sem <- struct{}{}:
	case <-ctx.Done():
		return nil, &Error{Op: "send", Retryable: retryable(ctx, ctx.Err()), Err: ctx.Err()}
	}
	defer func() { <-c.sem }()

	c.mu.Lock()
	closed, conn, br := c.closed, c.conn, c.br
	c.mu.Unlock()
	if closed {
		return nil, &Error{Op: "send", Err: ErrClientClosed}
	}
	if conn != nil && time.Since(c.lastUsed) >= c.stale && !alive(conn, br) {
		c.drop()
		conn = nil
	}
	if conn == nil {
		if err := c.connect(ctx); err != nil {
			return nil, err
		}
	}
	c.mu.Lock()
	conn, br = c.conn, c.br
	c.mu.Unlock()
	if conn == nil { // closed concurrently
		return nil, &Error{Op: "send", Err: ErrClientClosed}
	}

	// Interrupt blocked I/O when ctx ends.
	stop := context.AfterFunc(ctx, func() { conn.SetDeadline(time.Now()) })
	defer stop()

	// setDeadline bounds the next I/O step by d and by ctx. Checking ctx
	// after setting the deadline closes the race with the AfterFunc above,
	// whose deadline a later Set call would otherwise override.
	setDeadline := func(set func(time.Time) error, d time.Duration) error {
		t := time.Now().Add(d)
		if dl, ok := ctx.Deadline(); ok && dl.Before(t) {
			t = dl
		}
		if err := set(t); err != nil {
			return err
		}
		return ctx.Err()
	}
	if err := setDeadline(conn.SetWriteDeadline, durationOr(c.opts.WriteTimeout, 30*time.Second)); err != nil {
		c.drop()
		return nil, &Error{Op: "write", Retryable: retryable(ctx, err), Err: ctxErr(ctx, err)}
	}
	if err := WriteFrame(conn, payload); err != nil {
		c.drop()
		return nil, &Error{Op: "write", Retryable: retryable(ctx, err), Err: ctxErr(ctx, err)}
	}
	if err := setDeadline(conn.SetReadDeadline, durationOr(c.opts.AckTimeout, 60*time.Second)); err != nil {
		c.drop()
		return nil, &Error{Op: "read", Retryable: retryable(ctx, err), Err: ctxErr(ctx, err)}
	}
	ack, err := ReadFrame(br, c.opts.MaxFrameBytes)
	if err != nil {
		c.drop()
		if errors.Is(err, ErrFrameTooLarge) {
			return nil, &Error{Op: "read", Err: err}
		}
		return nil, &Error{Op: "read", Retryable: retryable(ctx, err), Err: ctxErr(ctx, err)}
	}
	c.lastUsed = time.Now()
	return ack, nil
}

// Close closes the connection; later sends fail with ErrClientClosed.
func (c *Client) Close() error {
	c.mu.Lock()
	defer c.mu.Unlock()
	c.closed = true
	if c.conn != nil {
		err := c.conn.Close()
		c.conn, c.br = nil, nil
		return err
	}
	return nil
}

// ctxErr prefers the context's error when the context ended, since the
// I/O error is then only its consequence.
func ctxErr(ctx context.Context, err error) error {
	if ctx.Err() != nil {
		return ctx.Err()
	}
	// The socket deadline may fire a moment before the context's timer.
	if dl, ok := ctx.Deadline(); ok && !time.Now().Before(dl) {
		return context.DeadlineExceeded
	}
	return err
}

// retryable classifies an I/O error.
func retryable(ctx context.Context, err error) bool {
	if errors.Is(ctx.Err(), context.Canceled) {
		return false // the caller gave up
	}
	var opErr *net.OpError
	if errors.As(err, &opErr) && opErr.Op == "remote error" {
		return false // a TLS alert from the peer, e.g. certificate required
	}
	var (
		certErr    *tls.CertificateVerificationError
		alertErr   tls.AlertError
		unknownCA  x509.UnknownAuthorityError
		hostErr    x509.HostnameError
		invalidErr x509.CertificateInvalidError
		recordErr  tls.RecordHeaderError
	)
	switch {
	case errors.As(err, &certErr), errors.As(err, &alertErr), errors.As(err, &unknownCA),
		errors.As(err, &hostErr), errors.As(err, &invalidErr), errors.As(err, &recordErr):
		return false // TLS configuration: resending will not help
	case errors.Is(err, ErrClientClosed):
		return false
	case errors.Is(err, io.EOF), errors.Is(err, io.ErrUnexpectedEOF), errors.Is(err, ErrFraming),
		errors.Is(err, os.ErrDeadlineExceeded), errors.Is(err, context.DeadlineExceeded):
		return true
	}
	return true // connection refused, reset, unreachable: transient
}
