package main

import (
	"context"
	"errors"
	"fmt"
	"sort"
	"sync"
	"sync/atomic"
	"time"

	"github.com/spf13/cobra"

	"filtrate/hl7v2"
	"filtrate/hl7v2/mllp"
)

// loadMessage is an invented ORU^R01 for load runs: one creatinine result
// for an invented patient; seq makes the control ID and patient unique.
func loadMessage(run string, seq int) []byte {
	return fmt.Appendf(nil, "MSH|^~\\&|LOADGEN|LOADLAB|LOADRCV|LOADFAC|20261130080000||ORU^R01^ORU_R01|%s-%d|P|2.5.1\r"+
		"PID|1||LOAD%d^^^LOADLAB^MR||Loadtest^Invented||19700101|%s\r"+
		"OBR|1|O%d|F%d|RENAL^Renal^L|||20261130070000\r"+
		"OBX|1|NM|2160-0^Creatinine^LN||%.2f|mg/dL|||||F|||20261130070000\r",
		run, seq, seq%500, []string{"F", "M"}[seq%2], seq, seq, 0.6+float64(seq%150)/100)
}

func newLoadCmd() *cobra.Command {
	var opts struct {
		to          string
		messages    int
		concurrency int
		duration    time.Duration
	}
	cmd := &cobra.Command{
		Use:   "load --to HOST:PORT [--messages N] [--concurrency C] [--duration D]",
		Short: "Send invented ORU^R01 messages over MLLP and report throughput and ACK latency",
		Long: `A load run for a test installation: send --messages invented ORU^R01 reports
(one creatinine result each, unique control IDs) over --concurrency MLLP
connections, stop after --duration at the latest, and print messages per
second, acknowledgement latency percentiles and the count of each ACK code.
Point it only at a daemon you run for testing (for example on 127.0.0.1); every
message is recorded in that daemon's audit trail.`,
		Args: cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			if opts.to == "" {
				return errors.New("--to HOST:PORT is required")
			}
			if opts.messages < 1 || opts.concurrency < 1 {
				return errors.New("--messages and --concurrency must be positive")
			}
			ctx, cancel := context.WithTimeout(cmd.Context(), opts.duration)
			defer cancel()
			run := fmt.Sprintf("L%d", time.Now().UnixNano()%1e9)
			var next atomic.Int64
			var mu sync.Mutex
			codes := map[string]int{}
			var lat []time.Duration
			var wg sync.WaitGroup
			start := time.Now()
			var firstErr error
			for range opts.concurrency {
				wg.Add(1)
				go func() {
					defer wg.Done()
					c, err := mllp.Dial(ctx, opts.to, mllp.ClientOptions{})
					if err != nil {
						mu.Lock()
						firstErr = firstNonNil(firstErr, err)
						mu.Unlock()
						return
					}
					defer c.Close()
					for ctx.Err() == nil {
						seq := int(next.Add(1))
						if seq > opts.messages {
							return
						}
						t0 := time.Now()
						raw, err := c.Send(ctx, loadMessage(run, seq))
						d := time.Since(t0)
						code := "ERROR"
						if err == nil {
							if ack, perr := hl7v2.ParseACK(raw); perr == nil {
								code = ack.Code
							}
						}
						mu.Lock()
						codes[code]++
						if err == nil {
							lat = append(lat, d)
						} else {
							firstErr = firstNonNil(firstErr, err)
						}
						mu.Unlock()
					}
				}()
			}
			wg.Wait()
			elapsed := time.Since(start)
			out := cmd.OutOrStdout()
			sent := len(lat)
			fmt.Fprintf(out, "sent %d messages in %s over %d connections: %.0f messages/s\n", sent, elapsed.Round(time.Millisecond), opts.concurrency, float64(sent)/elapsed.Seconds())
			if sent > 0 {
				sort.Slice(lat, func(i, j int) bool { return lat[i] < lat[j] })
				p := func(q float64) time.Duration { return lat[min(len(lat)-1, int(q*float64(len(lat))))] }
				fmt.Fprintf(out, "ACK latency: p50 %s, p95 %s, p99 %s, max %s\n", p(0.50), p(0.95), p(0.99), lat[len(lat)-1])
			}
			keys := make([]string, 0, len(codes))
			for k := range codes {
				keys = append(keys, k)
			}
			sort.Strings(keys)
			for _, k := range keys {
				fmt.Fprintf(out, "  %s %d\n", k, codes[k])
			}
			if firstErr != nil {
				fmt.Fprintf(out, "first error: %v\n", firstErr)
			}
			if codes["AA"] != sent || sent == 0 {
				return exitCode(2)
			}
			return nil
		},
	}
	f := cmd.Flags()
	f.StringVar(&opts.to, "to", "", "MLLP address of the daemon under test, HOST:PORT")
	f.IntVar(&opts.messages, "messages", 1000, "how many messages to send")
	f.IntVar(&opts.concurrency, "concurrency", 4, "parallel MLLP connections")
	f.DurationVar(&opts.duration, "duration", time.Minute, "stop after this long at the latest")
	return cmd
}

func firstNonNil(first, err error) error {
	if first != nil {
		return first
	}
	return err
}
