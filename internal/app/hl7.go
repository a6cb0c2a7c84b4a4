package app

import (
	"context"
	"fmt"
	"net"
	"sync"
	"time"

	"filtrate/config"
	"filtrate/hl7v2"
	"filtrate/hl7v2/mllp"
	"filtrate/internal/forward"
	"filtrate/internal/ingest"
	"filtrate/store"
)

func (a *App) setupHL7(cfg *config.Config) error {
	a.hl7 = &ingest.HL7{
		Proc:    a.proc,
		State:   a.State,
		Metrics: a.metrics,
		Logger:  a.log.With("listener", "hl7v2"),
		Limits:  hl7v2.Limits{MaxMessageBytes: cfg.HL7v2.MaxFrameBytes},
		History: a.store,
		Sent:    a.store,
	}
	for _, w := range a.workers {
		if w.Destination == ingest.DestinationHL7 {
			a.hl7.Notify = w.Notify
		}
	}
	if cfg.HL7v2.Listen == "" {
		return nil
	}
	tlsCfg, err := cfg.HL7v2.TLS.TLSConfig()
	if err != nil {
		return fmt.Errorf("hl7v2.tls: %w", err)
	}
	ln, err := net.Listen("tcp", cfg.HL7v2.Listen)
	if err != nil {
		return fmt.Errorf("hl7v2.listen: %w", err)
	}
	a.hl7Ln = countingListener(ln, a.metrics.Connections.WithLabelValues("hl7v2"))
	a.mllpSrv = &mllp.Server{
		Handler:         a.hl7,
		OversizeHandler: mllp.HandlerFunc(a.oversize),
		TLSConfig:       tlsCfg,
		MaxFrameBytes:   cfg.HL7v2.MaxFrameBytes,
		MaxConns:        cfg.HL7v2.MaxConnections,
		ReadTimeout:     cfg.HL7v2.ReadTimeout,
		IdleTimeout:     cfg.HL7v2.IdleTimeout,
		Logger:          a.log.With("listener", "hl7v2"),
	}
	return nil
}

// oversize answers a frame above the size limit with AR: it can never be
// accepted unchanged.
func (a *App) oversize(_ context.Context, head []byte) []byte {
	a.metrics.Received.WithLabelValues("hl7v2").Inc()
	a.metrics.Acknowledged.WithLabelValues("hl7v2", hl7v2.AckReject).Inc()
	msg, _ := hl7v2.ParseMSH(head)
	ack := hl7v2.BuildACKDetail(msg, hl7v2.AckReject, hl7v2.ErrorDetail{
		Code: hl7v2.ErrCodeApplication, Text: "message exceeds the maximum frame size",
	}, "FLTOVERSIZE", time.Now())
	return ack.Encode()
}

func (a *App) setupForwarders(cfg *config.Config) error {
	if cfg.HL7v2.Forward == "" {
		return nil
	}
	tlsCfg, err := cfg.HL7v2.ForwardTLS.TLSConfig()
	if err != nil {
		return fmt.Errorf("hl7v2.forward_tls: %w", err)
	}
	sender := &mllpSender{addr: cfg.HL7v2.Forward, opts: mllp.ClientOptions{TLSConfig: tlsCfg, AckTimeout: cfg.HL7v2.AckTimeout}}
	a.addCleanup("hl7v2 forward connection", func(context.Context) error { return sender.Close() })
	w := &forward.Worker{
		Destination: ingest.DestinationHL7,
		Name:        a.opts.WorkerName,
		Outbox:      a.store,
		Sender:      sender,
		Backoff:     forward.Backoff{Initial: cfg.HL7v2.Retry.Initial, Max: cfg.HL7v2.Retry.Max},
		Poll:        a.opts.ForwardPoll,
		SendTimeout: cfg.HL7v2.AckTimeout + 5*time.Second, // dial and write on top of the ACK wait
		Metrics:     a.metrics,
		Logger:      a.log,
	}
	w.Init()
	a.workers = append(a.workers, w)
	return nil
}

// mllpSender delivers outbox items over MLLP and reads the
// acknowledgement: AA (or CA) is delivered; AR (or CR) is a final refusal,
// parked for a person; AE, time-outs and connection errors are retried.
type mllpSender struct {
	addr string
	opts mllp.ClientOptions

	mu     sync.Mutex // serialises sends
	client *mllp.Client

	cmu     sync.Mutex // guards current, for Close during a Send
	current *mllp.Client
}

func (s *mllpSender) Send(ctx context.Context, it store.OutboxItem) (string, error) {
	s.mu.Lock()
	defer s.mu.Unlock()
	if s.client == nil {
		c, err := mllp.Dial(ctx, s.addr, s.opts)
		if err != nil {
			return "", fmt.Errorf("connect downstream: %w", err)
		}
		s.client = c
		s.cmu.Lock()
		s.current = c
		s.cmu.Unlock()
	}
	raw, err := s.client.Send(ctx, it.Payload)
	if err != nil {
		return "", fmt.Errorf("send downstream: %w", err)
	}
	ack, err := hl7v2.ParseACK(raw)
	if err != nil {
		s.drop() // whatever follows on this connection cannot be trusted
		return "", fmt.Errorf("downstream acknowledgement unreadable: %w", err)
	}
	if ack.ControlID != it.MessageID {
		// A late answer to an earlier message, or a peer that does not
		// echo MSA-2: never take it for this message's acknowledgement.
		s.drop()
		return "", fmt.Errorf("downstream acknowledged control ID %q, not the message sent", ack.ControlID)
	}
	switch ack.Code {
	case hl7v2.AckAccept, "CA":
		return ack.Code + " " + ack.ControlID, nil
	case hl7v2.AckReject, "CR":
		return "", &forward.RejectedError{Reason: ack.Code + " error code " + ack.ErrorCode}
	default:
		return "", fmt.Errorf("downstream answered %s (error code %s)", ack.Code, ack.ErrorCode)
	}
}

// drop closes the connection; the next Send dials again. Called with mu
// held.
func (s *mllpSender) drop() {
	if s.client != nil {
		_ = s.client.Close()
		s.client = nil
		s.cmu.Lock()
		s.current = nil
		s.cmu.Unlock()
	}
}

// Close closes the connection without waiting for a Send in progress (the
// client's Close is safe to call concurrently and makes that Send fail),
// so that shutdown is not held up by a slow peer.
func (s *mllpSender) Close() error {
	s.cmu.Lock()
	c := s.current
	s.cmu.Unlock()
	if c == nil {
		return nil
	}
	return c.Close()
}
