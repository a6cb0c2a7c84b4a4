package forward

import (
	"context"
	"errors"
	"sync"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/testutil"
	"github.com/stretchr/testify/require"

	"filtrate/internal/telemetry"
	"filtrate/store"
)

// fakeOutbox records what the worker did with each item.
type fakeOutbox struct {
	mu      sync.Mutex
	items   []store.OutboxItem
	sent    map[int64]string
	parked  map[int64]string
	retries map[int64]time.Time
}

func newFakeOutbox(items ...store.OutboxItem) *fakeOutbox {
	return &fakeOutbox{items: items, sent: map[int64]string{}, parked: map[int64]string{}, retries: map[int64]time.Time{}}
}

func (f *fakeOutbox) Claim(_ context.Context, dest, _ string, limit int, _ time.Duration) ([]store.OutboxItem, error) {
	f.mu.Lock()
	defer f.mu.Unlock()
	var out []store.OutboxItem
	for len(f.items) > 0 && len(out) < limit {
		it := f.items[0]
		f.items = f.items[1:]
		if it.Destination == dest {
			it.Attempts++
			out = append(out, it)
		}
	}
	return out, nil
}

func (f *fakeOutbox) MarkSent(ctx context.Context, id int64, ack string) error {
	if err := ctx.Err(); err != nil {
		return err // like the store: a dead context records nothing
	}
	f.mu.Lock()
	defer f.mu.Unlock()
	f.sent[id] = ack
	return nil
}

func (f *fakeOutbox) Retry(ctx context.Context, id int64, next time.Time, _ string) error {
	if err := ctx.Err(); err != nil {
		return err // like the store: a dead context records nothing
	}
	f.mu.Lock()
	defer f.mu.Unlock()
	f.retries[id] = next
	return nil
}

func (f *fakeOutbox) Park(ctx context.Context, id int64, reason string) error {
	if err := ctx.Err(); err != nil {
		return err // like the store: a dead context records nothing
	}
	f.mu.Lock()
	defer f.mu.Unlock()
	f.parked[id] = reason
	return nil
}

func item(id int64, attempts int) store.OutboxItem {
	return store.OutboxItem{ID: id, Attempts: attempts, OutboxMessage: store.OutboxMessage{Destination: "hl7v2", Payload: []byte("x")}}
}

func TestBackoffIsExponentialAndCapped(t *testing.T) {
	b := Backoff{Initial: time.Second, Max: 10 * time.Second}
	want := []time.Duration{time.Second, time.Second, 2 * time.Second, 4 * time.Second, 8 * time.Second, 10 * time.Second, 10 * time.Second}
	for n, w := range want {
		require.Equal(t, w, b.Delay(n), "attempt %d", n)
	}
	require.Equal(t, 10*time.Second, b.Delay(500), "no overflow")
}

func TestWorkerOutcomes(t *testing.T) {
	now := time.Date(2026, 12, 1, 8, 0, 0, 0, time.UTC)
	box := newFakeOutbox(item(1, 0), item(2, 0), item(3, 2))
	reg := prometheus.NewPedanticRegistry()
	m := telemetry.New(reg, "test", nil, nil)
	w := &Worker{
		Destination: "hl7v2", Name: "w1", Outbox: box, Metrics: m,
		Backoff: Backoff{Initial: time.Second, Max: time.Minute},
		Now:     func() time.Time { return now },
		Sender: SenderFunc(func(_ context.Context, it store.OutboxItem) (string, error) {
			switch it.ID {
			case 1:
				return "AA MSG1", nil
			case 2:
				return "", &RejectedError{Reason: "AR: unsupported message type"}
			default:
				return "", errors.New("connection refused")
			}
		}),
	}
	n, err := w.RunOnce(context.Background())
	require.NoError(t, err)
	require.Equal(t, 3, n)
	require.Equal(t, map[int64]string{1: "AA MSG1"}, box.sent)
	require.Contains(t, box.parked[2], "AR: unsupported message type")
	// Third attempt (attempts counted by the claim): 1 s × 2² = 4 s.
	require.Equal(t, now.Add(4*time.Second), box.retries[3])
	require.Equal(t, 1.0, testutil.ToFloat64(m.ForwardAttempts.WithLabelValues("hl7v2", "sent")))
	require.Equal(t, 1.0, testutil.ToFloat64(m.ForwardAttempts.WithLabelValues("hl7v2", "parked")))
	require.Equal(t, 1.0, testutil.ToFloat64(m.ForwardAttempts.WithLabelValues("hl7v2", "retry")))
}

func TestWorkerFinishesDeliveryWhenShutDown(t *testing.T) {
	box := newFakeOutbox(item(7, 0))
	ctx, cancel := context.WithCancel(context.Background())
	started := make(chan struct{})
	release := make(chan struct{})
	w := &Worker{Destination: "hl7v2", Name: "w1", Outbox: box, Poll: time.Hour,
		Sender: SenderFunc(func(sctx context.Context, _ store.OutboxItem) (string, error) {
			close(started)
			<-release
			return "AA", sctx.Err() // the send context must outlive the run context
		})}
	done := make(chan error)
	go func() { done <- w.Run(ctx) }()
	<-started
	cancel()
	close(release)
	require.NoError(t, <-done)
	require.Equal(t, map[int64]string{7: "AA"}, box.sent)
}

func TestNotifyWakesWorker(t *testing.T) {
	box := newFakeOutbox()
	sent := make(chan int64, 1)
	w := &Worker{Destination: "hl7v2", Name: "w1", Outbox: box, Poll: time.Hour,
		Sender: SenderFunc(func(_ context.Context, it store.OutboxItem) (string, error) {
			sent <- it.ID
			return "AA", nil
		})}
	w.Init()
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	go func() { _ = w.Run(ctx) }()
	box.mu.Lock()
	box.items = append(box.items, item(9, 0))
	box.mu.Unlock()
	w.Notify()
	require.Equal(t, int64(9), <-sent) // with a one-hour poll, only Notify can deliver it
}

func TestRejectedErrorUnwraps(t *testing.T) {
	base := errors.New("AR")
	err := error(&RejectedError{Reason: "r", Err: base})
	require.ErrorIs(t, err, base)
	var rej *RejectedError
	require.ErrorAs(t, err, &rej)
}

// Claims not yet delivered when the worker stops are handed back at once.
func TestShutdownReleasesUndeliveredClaims(t *testing.T) {
	box := newFakeOutbox(item(1, 0), item(2, 0), item(3, 0))
	ctx, cancel := context.WithCancel(context.Background())
	now := time.Date(2026, 12, 1, 8, 0, 0, 0, time.UTC)
	w := &Worker{Destination: "hl7v2", Name: "w1", Outbox: box, Now: func() time.Time { return now },
		Sender: SenderFunc(func(context.Context, store.OutboxItem) (string, error) {
			cancel() // shutdown arrives during the first delivery
			return "AA", nil
		})}
	n, err := w.RunOnce(ctx)
	require.NoError(t, err)
	require.Equal(t, 1, n)
	require.Equal(t, map[int64]string{1: "AA"}, box.sent)
	require.Equal(t, map[int64]time.Time{2: now, 3: now}, box.retries, "released, due now")
}

// A send that uses up its whole time still gets its retry recorded: the
// bookkeeping has a context of its own.
func TestOutcomeRecordedAfterSendTimeout(t *testing.T) {
	box := newFakeOutbox(item(4, 0))
	w := &Worker{Destination: "hl7v2", Name: "w1", Outbox: box, SendTimeout: 20 * time.Millisecond,
		Sender: SenderFunc(func(sctx context.Context, _ store.OutboxItem) (string, error) {
			<-sctx.Done()
			return "", sctx.Err()
		})}
	_, err := w.RunOnce(context.Background())
	require.NoError(t, err)
	require.Contains(t, box.retries, int64(4))
}

// An item whose claim would run out during the delivery is not sent but
// handed back.
func TestNoDeliveryOnAnExpiringLease(t *testing.T) {
	now := time.Date(2026, 12, 1, 8, 0, 0, 0, time.UTC)
	fresh, stale := item(1, 0), item(2, 0)
	fresh.LeaseUntil = now.Add(10 * time.Minute)
	stale.LeaseUntil = now.Add(5 * time.Second)
	box := newFakeOutbox(fresh, stale)
	var sent []int64
	w := &Worker{Destination: "hl7v2", Name: "w1", Outbox: box, SendTimeout: 30 * time.Second, Now: func() time.Time { return now },
		Sender: SenderFunc(func(_ context.Context, it store.OutboxItem) (string, error) {
			sent = append(sent, it.ID)
			return "AA", nil
		})}
	n, err := w.RunOnce(context.Background())
	require.NoError(t, err)
	require.Equal(t, 1, n)
	require.Equal(t, []int64{1}, sent)
	require.Equal(t, map[int64]time.Time{2: now}, box.retries, "handed back, due now")
}
