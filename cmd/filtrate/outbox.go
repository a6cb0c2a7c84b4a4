package main

import (
	"fmt"
	"strconv"
	"time"

	"github.com/spf13/cobra"

	"filtrate/store"
)

// withStore opens the store the configuration names (without migrating
// it), runs fn and closes the store.
func withStore(cmd *cobra.Command, cfgPath string, fn func(store.Store) error) error {
	cfg, err := auditConfig(cfgPath)
	if err != nil {
		return err
	}
	s, err := openAuditStore(cmd.Context(), cfg, nil)
	if err != nil {
		return err
	}
	defer s.Close()
	return fn(s)
}

func newOutboxCmd() *cobra.Command {
	var cfgPath string
	cmd := &cobra.Command{
		Use:   "outbox",
		Short: "Inspect the delivery queue and re-send parked messages",
		Long: `Messages the downstream system rejected for good (HL7 v2 AR, FHIR 4xx) are parked
for a person; the same patient's later reports wait behind them, so that a
correction never overtakes its original. "outbox status" shows the queue per
destination, "outbox parked" lists parked messages with the reason, "outbox
requeue ID" sends one again once the cause is fixed downstream, and "outbox
discard ID --reason TEXT" closes one that must not be sent.`,
	}
	cmd.PersistentFlags().StringVar(&cfgPath, "config", "", "configuration file (YAML) naming the store; default: built-in")
	cmd.AddCommand(&cobra.Command{
		Use:   "status",
		Short: "Show pending, in-flight and parked counts per destination",
		Args:  cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			return withStore(cmd, cfgPath, func(s store.Store) error {
				stats, err := s.OutboxStats(cmd.Context())
				if err != nil {
					return err
				}
				out := cmd.OutOrStdout()
				fmt.Fprintln(out, "destination\tpending\tin_flight\toldest_pending\tparked")
				for _, st := range stats {
					fmt.Fprintf(out, "%s\t%d\t%d\t%s\t%d\n", st.Destination, st.Pending, st.InFlight, st.OldestPendingAge.Round(time.Second), st.Parked)
				}
				return nil
			})
		},
	})
	cmd.AddCommand(&cobra.Command{
		Use:   "parked",
		Short: "List parked messages",
		Args:  cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			return withStore(cmd, cfgPath, func(s store.Store) error {
				items, err := s.ListParked(cmd.Context())
				if err != nil {
					return err
				}
				out := cmd.OutOrStdout()
				fmt.Fprintln(out, "id\tdestination\tmessage_id\tattempts\tparked_at\treason")
				for _, it := range items {
					fmt.Fprintf(out, "%d\t%s\t%s\t%d\t%s\t%s\n", it.ID, it.Destination, it.MessageID, it.Attempts, it.ParkedAt.UTC().Format(time.RFC3339), it.LastError)
				}
				fmt.Fprintf(out, "%d parked\n", len(items))
				return nil
			})
		},
	})
	cmd.AddCommand(&cobra.Command{
		Use:   "requeue ID",
		Short: "Send a parked message again",
		Args:  cobra.ExactArgs(1),
		RunE: func(cmd *cobra.Command, args []string) error {
			id, err := strconv.ParseInt(args[0], 10, 64)
			if err != nil {
				return fmt.Errorf("outbox requeue: ID must be a number")
			}
			return withStore(cmd, cfgPath, func(s store.Store) error {
				if err := s.Requeue(cmd.Context(), id); err != nil {
					return fmt.Errorf("outbox requeue %d: %w", id, err)
				}
				fmt.Fprintf(cmd.OutOrStdout(), "outbox item %d requeued; a running daemon sends it at its next poll\n", id)
				return nil
			})
		},
	})
	var reason string
	discard := &cobra.Command{
		Use:   "discard ID --reason TEXT",
		Short: "Close a parked message without sending it",
		Long: `Close a parked message that must not be sent (the laboratory decided so and
recorded why), so that the same patient's later reports, which wait behind it to
keep their order, go out. The item is kept with the reason; audit records are
not touched.`,
		Args: cobra.ExactArgs(1),
		RunE: func(cmd *cobra.Command, args []string) error {
			id, err := strconv.ParseInt(args[0], 10, 64)
			if err != nil {
				return fmt.Errorf("outbox discard: ID must be a number")
			}
			if reason == "" {
				return fmt.Errorf("outbox discard: --reason is required")
			}
			return withStore(cmd, cfgPath, func(s store.Store) error {
				if err := s.Discard(cmd.Context(), id, reason); err != nil {
					return fmt.Errorf("outbox discard %d: %w", id, err)
				}
				fmt.Fprintf(cmd.OutOrStdout(), "outbox item %d discarded; later reports of its patient proceed\n", id)
				return nil
			})
		},
	}
	discard.Flags().StringVar(&reason, "reason", "", "why the message is not sent (kept with the item; no patient data)")
	cmd.AddCommand(discard)
	return cmd
}
