package mllp

import (
	"bufio"
	"context"
	"crypto/tls"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"net"
	"os"
	"runtime/debug"
	"sync"
	"time"
)

// Handler answers one received message. The returned payload is sent back in
// one frame; a nil return closes the connection without an answer (the peer
// will time out and resend). ServeMLLP is called concurrently for different
// connections, and sequentially for the messages of one connection.
//
// ctx is cancelled when the server is closed.
type Handler interface {
	ServeMLLP(ctx context.Context, payload []byte) []byte
}

// HandlerFunc adapts a function to a Handler.
type HandlerFunc func(ctx context.Context, payload []byte) []byte

// ServeMLLP calls f.
func (f HandlerFunc) ServeMLLP(ctx context.Context, payload []byte) []byte { return f(ctx, payload) }

// ErrServerClosed is returned by Serve and ListenAndServe after Shutdown or
// Close.
var ErrServerClosed = errors.New("mllp: server closed")

// Server accepts MLLP connections and passes each received message to a
// Handler. Its fields must be set before Serve is called and not changed
// afterwards. The zero value of each field is a usable default.
type Server struct {
	// Handler answers each message. Required.
	Handler Handler

	// OversizeHandler answers a frame whose payload exceeds MaxFrameBytes.
	// It receives the first MaxFrameBytes bytes of the payload, enough to
	// read the message header and return a rejecting acknowledgement (AR).
	// When nil, the server closes the connection instead; the sender then
	// sees a connection error and, if it retries, fails the same way.
	OversizeHandler Handler

	// TLSConfig, when set, makes the server speak TLS. Set ClientAuth and
	// ClientCAs in it to require client certificates.
	TLSConfig *tls.Config

	// MaxFrameBytes limits the payload of one frame. Default
	// DefaultMaxFrameBytes.
	MaxFrameBytes int
	// MaxConns limits concurrent connections; a connection above the limit
	// is closed at once (and logged). Zero means no limit.
	MaxConns int
	// ReadTimeout bounds the time to receive a whole frame once its first
	// byte has arrived, and the TLS handshake. Default 30 s.
	ReadTimeout time.Duration
	// IdleTimeout bounds the wait for the next frame on an open connection.
	// Default 5 min.
	IdleTimeout time.Duration
	// WriteTimeout bounds the time to send an answer. Default 30 s.
	WriteTimeout time.Duration

	// Logger receives connection-level events (never payloads). Default:
	// discard.
	Logger *slog.Logger

	mu         sync.Mutex
	listeners  map[net.Listener]struct{}
	conns      map[*serverConn]struct{}
	inShutdown bool
	wg         sync.WaitGroup
	ctx        context.Context
	cancel     context.CancelFunc
}

type connState int

const (
	stateIdle connState = iota // waiting for a frame to start
	stateActive
)

type serverConn struct {
	rwc    net.Conn
	state  connState
	closed bool // closed by Shutdown while idle
}

func (s *Server) init() {
	if s.listeners == nil {
		s.listeners = map[net.Listener]struct{}{}
		s.conns = map[*serverConn]struct{}{}
		s.ctx, s.cancel = context.WithCancel(context.Background())
	}
}

func (s *Server) logger() *slog.Logger {
	if s.Logger != nil {
		return s.Logger
	}
	return slog.New(slog.DiscardHandler)
}

func durationOr(d, def time.Duration) time.Duration {
	if d > 0 {
		return d
	}
	return def
}

// ListenAndServe listens on the TCP address addr and calls Serve.
func (s *Server) ListenAndServe(addr string) error {
	l, err := net.Listen("tcp", addr)
	if err != nil {
		return fmt.Errorf("mllp: listen: %w", err)
	}
	return s.Serve(l)
}

// Serve accepts connections on l until Shutdown or Close, and then returns
// ErrServerClosed. Serve closes l.
func (s *Server) Serve(l net.Listener) error {
	if s.Handler == nil {
		l.Close()
		return errors.New("mllp: server has no handler")
	}
	if s.TLSConfig != nil {
		l = tls.NewListener(l, s.TLSConfig)
	}
	s.mu.Lock()
	s.init()
	if s.inShutdown {
		s.mu.Unlock()
		l.Close()
		return ErrServerClosed
	}
	s.listeners[l] = struct{}{}
	s.mu.Unlock()
	defer func() {
		s.mu.Lock()
		delete(s.listeners, l)
		s.mu.Unlock()
		l.Close()
	}()

	log := s.logger()
	var backoff time.Duration
	for {
		rwc, err := l.Accept()
		if err != nil {
			if s.shuttingDown() {
				return ErrServerClosed
			}
			if errors.Is(err, net.ErrClosed) {
				return fmt.Errorf("mllp: accept: %w", err)
			}
			// Resource exhaustion (too many open files) and the like: wait
			// and try again, as net/http does.
			backoff = min(max(2*backoff, 5*time.Millisecond), time.Second)
			log.Warn("mllp accept failed; retrying", "err", err, "backoff", backoff)
			time.Sleep(backoff)
			continue
		}
		backoff = 0
		c := &serverConn{rwc: rwc}
		if !s.track(c) {
			rwc.Close()
			continue
		}
		go s.serveConn(c)
	}
}

// track registers a new connection; it refuses it during shutdown and above
// MaxConns.
func (s *Server) track(c *serverConn) bool {
	s.mu.Lock()
	defer s.mu.Unlock()
	if s.inShutdown {
		return false
	}
	if s.MaxConns > 0 && len(s.conns) >= s.MaxConns {
		s.logger().Warn("mllp connection refused: connection limit reached",
			"remote", c.rwc.RemoteAddr().String(), "max_conns", s.MaxConns)
		return false
	}
	s.conns[c] = struct{}{}
	s.wg.Add(1)
	return true
}

func (s *Server) shuttingDown() bool {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.inShutdown
}

// setState records a connection's state and reports whether it may go on.
func (s *Server) setState(c *serverConn, st connState) bool {
	s.mu.Lock()
	defer s.mu.Unlock()
	if c.closed || (st == stateIdle && s.inShutdown) {
		return false
	}
	c.state = st
	return true
}

func (s *Server) serveConn(c *serverConn) {
	log := s.logger().With("remote", c.rwc.RemoteAddr().String())
	defer func() {
		if r := recover(); r != nil {
			log.Error("mllp handler panicked; connection closed", "panic", fmt.Sprint(r), "stack", string(debug.Stack()))
		}
		c.rwc.Close()
		s.mu.Lock()
		delete(s.conns, c)
		s.mu.Unlock()
		s.wg.Done()
	}()

	readTimeout := durationOr(s.ReadTimeout, 30*time.Second)
	idleTimeout := durationOr(s.IdleTimeout, 5*time.Minute)
	writeTimeout := durationOr(s.WriteTimeout, 30*time.Second)

	if tc, ok := c.rwc.(*tls.Conn); ok {
		ctx, cancel := context.WithTimeout(s.ctx, readTimeout)
		err := tc.HandshakeContext(ctx)
		cancel()
		if err != nil {
			log.Warn("mllp TLS handshake failed", "err", err)
			return
		}
	}

	br := bufio.NewReaderSize(c.rwc, 32<<10)
	for {
		if !s.setState(c, stateIdle) {
			return
		}
		if err := c.rwc.SetReadDeadline(time.Now().Add(idleTimeout)); err != nil {
			return
		}
		if _, err := br.Peek(1); err != nil {
			if !isClosing(err) {
				log.Debug("mllp connection idle or closed", "err", err)
			}
			return
		}
		if !s.setState(c, stateActive) {
			return
		}
		if err := c.rwc.SetReadDeadline(time.Now().Add(readTimeout)); err != nil {
			return
		}
		payload, err := ReadFrame(br, s.MaxFrameBytes)
		var answer []byte
		switch {
		case err == nil:
			answer = s.Handler.ServeMLLP(s.ctx, payload)
		case errors.Is(err, ErrFrameTooLarge):
			if s.OversizeHandler == nil {
				log.Warn("mllp frame too large; connection closed", "limit", s.maxFrame())
				return
			}
			log.Warn("mllp frame too large; answered by the oversize handler", "limit", s.maxFrame())
			answer = s.OversizeHandler.ServeMLLP(s.ctx, payload)
		default:
			log.Warn("mllp read failed; connection closed", "err", err)
			return
		}
		if answer == nil {
			log.Warn("mllp handler gave no answer; connection closed")
			return
		}
		if err := c.rwc.SetWriteDeadline(time.Now().Add(writeTimeout)); err != nil {
			return
		}
		if err := WriteFrame(c.rwc, answer); err != nil {
			log.Warn("mllp write failed; connection closed", "err", err)
			return
		}
	}
}

func (s *Server) maxFrame() int {
	if s.MaxFrameBytes > 0 {
		return s.MaxFrameBytes
	}
	return DefaultMaxFrameBytes
}

// isClosing reports errors that are the normal end of a connection.
func isClosing(err error) bool {
	return errors.Is(err, io.EOF) || errors.Is(err, net.ErrClosed) || errors.Is(err, os.ErrDeadlineExceeded)
}

// Shutdown stops the server gracefully: it closes the listeners, closes idle
// connections, lets each active connection finish the message it is
// handling and send its answer, then closes it. It returns when all
// connections are closed, or when ctx ends, in which case it calls Close
// (remaining connections are closed at once and the handlers' context is
// cancelled) and returns ctx's error without waiting for handlers to return.
// Calling it more than once is safe.
func (s *Server) Shutdown(ctx context.Context) error {
	s.mu.Lock()
	s.init()
	s.inShutdown = true
	for l := range s.listeners {
		l.Close()
		delete(s.listeners, l)
	}
	for c := range s.conns {
		if c.state == stateIdle {
			c.closed = true
			c.rwc.Close()
		}
	}
	s.mu.Unlock()

	done := make(chan struct{})
	go func() {
		s.wg.Wait()
		close(done)
	}()
	select {
	case <-done:
		s.cancel()
		return nil
	case <-ctx.Done():
		s.Close()
		return ctx.Err()
	}
}

// Close stops the server at once: listeners and all connections are closed
// and the handlers' context is cancelled. Calling it more than once is safe.
func (s *Server) Close() error {
	s.mu.Lock()
	s.init()
	s.inShutdown = true
	for l := range s.listeners {
		l.Close()
		delete(s.listeners, l)
	}
	for c := range s.conns {
		c.closed = true
		c.rwc.Close()
	}
	s.mu.Unlock()
	s.cancel()
	return nil
}
