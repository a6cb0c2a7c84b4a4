// Package forward delivers enriched messages from the store's outbox to
// downstream systems. A Worker claims due items for one destination, hands
// each to a Sender, and records the result: acknowledged items are marked
// sent, items the receiver rejected for good are parked for a person, and
// everything else is retried with capped exponential backoff. Claims are
// leased in the database, so several daemons can share one outbox and a
// crashed worker's items are picked up again.
package forward

import (
	"context"
	"errors"
	"fmt"
	"log/slog"
	"time"

	"filtrate/internal/telemetry"
	"filtrate/store"
)

// Outbox is the part of the store a Worker uses.
type Outbox interface {
	Claim(ctx context.Context, destination, worker string, limit int, lease time.Duration) ([]store.OutboxItem, error)
	MarkSent(ctx context.Context, id int64, ackInfo string) error
	Retry(ctx context.Context, id int64, next time.Time, reason string) error
	Park(ctx context.Context, id int64, reason string) error
}

// Sender delivers one item and returns what the receiver acknowledged. An
// error that is (or wraps) a *RejectedError parks the item; any other error
// is retried.
type Sender interface {
	Send(ctx context.Context, item store.OutboxItem) (ackInfo string, err error)
}

// SenderFunc adapts a function to Sender.
type SenderFunc func(ctx context.Context, item store.OutboxItem) (string, error)

// Send calls f.
func (f SenderFunc) Send(ctx context.Context, item store.OutboxItem) (string, error) {
	return f(ctx, item)
}

// RejectedError reports that the receiver refused an item for good (HL7 v2
// AR, HTTP 4xx): sending it again would fail again, so a person must look.
// Reason must not contain patient data.
type RejectedError struct {
	Reason string
	Err    error
}

func (e *RejectedError) Error() string {
	if e.Err != nil {
		return "rejected by receiver: " + e.Reason + ": " + e.Err.Error()
	}
	return "rejected by receiver: " + e.Reason
}

// Unwrap returns the underlying error.
func (e *RejectedError) Unwrap() error { return e.Err }

// Backoff is a capped exponential backoff.
type Backoff struct {
	Initial time.Duration
	Max     time.Duration
}

// Delay returns the wait before attempt n+1 after n failed attempts
// (n >= 1): Initial × 2^(n−1), capped at Max.
func (b Backoff) Delay(n int) time.Duration {
	if n < 1 {
		n = 1
	}
	d := b.Initial
	for i := 1; i < n; i++ {
		d *= 2
		if d >= b.Max || d <= 0 {
			return b.Max
		}
	}
	if d > b.Max {
		return b.Max
	}
	return d
}

// Worker delivers one destination's outbox items.
type Worker struct {
	Destination string        // destination name, as in the outbox
	Name        string        // this worker's identity in claims
	Outbox      Outbox        // where items come from
	Sender      Sender        // how items are delivered
	Backoff     Backoff       // retry schedule
	Poll        time.Duration // how often to look for due items when not woken
	Lease       time.Duration // claim lease; must exceed SendTimeout
	SendTimeout time.Duration // bound on one delivery attempt
	Batch       int           // items per claim
	Metrics     *telemetry.Metrics
	Logger      *slog.Logger
	Now         func() time.Time

	wake chan struct{}
}

func (w *Worker) defaults() {
	if w.Poll <= 0 {
		w.Poll = time.Second
	}
	if w.SendTimeout <= 0 {
		w.SendTimeout = 30 * time.Second
	}
	if w.Lease < 2*(w.SendTimeout+bookkeepingTimeout) {
		w.Lease = 2*(w.SendTimeout+bookkeepingTimeout) + 10*time.Second
	}
	if w.Batch <= 0 {
		w.Batch = 16
	}
	if w.Backoff.Initial <= 0 {
		w.Backoff.Initial = time.Second
	}
	if w.Backoff.Max < w.Backoff.Initial {
		w.Backoff.Max = 5 * time.Minute
	}
	if w.Logger == nil {
		w.Logger = slog.New(slog.DiscardHandler)
	}
	if w.Now == nil {
		w.Now = time.Now
	}
	if w.wake == nil {
		w.wake = make(chan struct{}, 1)
	}
}

// Notify wakes the worker early (after a new item was accepted). It never
// blocks. Call it only after Run has started or before with Init.
func (w *Worker) Notify() {
	select {
	case w.wake <- struct{}{}:
	default:
	}
}

// Init prepares the worker so that Notify may be called before Run.
func (w *Worker) Init() { w.defaults() }

// Run delivers items until ctx is cancelled. A delivery in progress when ctx
// ends is finished (bounded by SendTimeout) and its result recorded, so an
// acknowledged item is never left unmarked by a shutdown.
func (w *Worker) Run(ctx context.Context) error {
	w.defaults()
	for {
		n, err := w.RunOnce(ctx)
		if err != nil && ctx.Err() == nil {
			w.Logger.Warn("outbox claim failed", "destination", w.Destination, "err", err)
		}
		if ctx.Err() != nil {
			return nil
		}
		if n == w.Batch {
			continue // more may be due
		}
		t := time.NewTimer(w.Poll)
		select {
		case <-ctx.Done():
			t.Stop()
			return nil
		case <-w.wake:
			t.Stop()
		case <-t.C:
		}
	}
}

// RunOnce claims one batch and delivers it, returning how many items it
// claimed.
func (w *Worker) RunOnce(ctx context.Context) (int, error) {
	w.defaults()
	items, err := w.Outbox.Claim(ctx, w.Destination, w.Name, w.Batch, w.Lease)
	if err != nil {
		return 0, fmt.Errorf("forward: claim %s: %w", w.Destination, err)
	}
	for i, it := range items {
		// Never start a delivery whose claim could run out before the
		// delivery and its bookkeeping end: another daemon could claim
		// and send the item meanwhile, and out of order.
		if !it.LeaseUntil.IsZero() && it.LeaseUntil.Sub(w.Now()) < w.SendTimeout+bookkeepingTimeout {
			w.release(ctx, items[i:])
			return i, nil
		}
		if ctx.Err() != nil {
			// Shutting down: hand the remaining claims back at once so
			// that another daemon (or this one after a restart) need not
			// wait for their lease to run out.
			w.release(ctx, items[i:])
			return i, nil
		}
		w.deliver(ctx, it)
	}
	return len(items), nil
}

func (w *Worker) release(ctx context.Context, items []store.OutboxItem) {
	rctx, cancel := context.WithTimeout(context.WithoutCancel(ctx), 5*time.Second)
	defer cancel()
	for _, it := range items {
		if err := w.Outbox.Retry(rctx, it.ID, w.Now(), "released at shutdown"); err != nil {
			w.Logger.Warn("outbox release failed; the claim expires with its lease", "destination", w.Destination, "item", it.ID, "err", err)
		}
	}
}

// bookkeepingTimeout bounds recording a delivery's outcome in the store;
// it has its own context, so a send that used up its time still gets its
// outcome recorded.
const bookkeepingTimeout = 10 * time.Second

func (w *Worker) deliver(ctx context.Context, it store.OutboxItem) {
	// Finish this attempt even if ctx ends now; record its outcome.
	sctx, cancel := context.WithTimeout(context.WithoutCancel(ctx), w.SendTimeout)
	ack, err := w.Sender.Send(sctx, it)
	cancel()
	sctx, cancel = context.WithTimeout(context.WithoutCancel(ctx), bookkeepingTimeout)
	defer cancel()
	var rej *RejectedError
	switch {
	case err == nil:
		if merr := w.Outbox.MarkSent(sctx, it.ID, ack); merr != nil {
			w.Logger.Error("outbox mark sent failed; the item may be sent again", "destination", w.Destination, "item", it.ID, "err", merr)
		}
		w.count("sent")
	case errors.As(err, &rej):
		if perr := w.Outbox.Park(sctx, it.ID, rej.Error()); perr != nil {
			w.Logger.Error("outbox park failed", "destination", w.Destination, "item", it.ID, "err", perr)
		}
		w.Logger.Warn("receiver rejected a message; parked for review", "destination", w.Destination, "item", it.ID, "reason", rej.Reason)
		w.count("parked")
	default:
		next := w.Now().Add(w.Backoff.Delay(it.Attempts))
		if rerr := w.Outbox.Retry(sctx, it.ID, next, err.Error()); rerr != nil {
			w.Logger.Error("outbox retry failed", "destination", w.Destination, "item", it.ID, "err", rerr)
		}
		w.Logger.Info("delivery failed; will retry", "destination", w.Destination, "item", it.ID, "attempts", it.Attempts, "next", next, "err", err)
		w.count("retry")
	}
}

func (w *Worker) count(outcome string) {
	if w.Metrics != nil {
		w.Metrics.ForwardAttempts.WithLabelValues(w.Destination, outcome).Inc()
	}
}
