package main

import (
	"errors"

	"github.com/spf13/cobra"
)

// exitCode is returned by a command that has already printed its findings
// and only needs the process to exit with a status (e.g. "send" when an ACK
// was not AA, "audit verify" on a broken chain).
type exitCode int

func (e exitCode) Error() string { return "exit status" }

func asExit(err error, target *exitCode) bool { return errors.As(err, target) }

func newRootCmd(version string) *cobra.Command {
	root := &cobra.Command{
		Use:   "filtrate",
		Short: "eGFR reporting middleware for clinical laboratories",
		Long: `filtrate computes eGFR for creatinine and cystatin C results in the laboratory's
result stream, with the equation and rules the laboratory adopted, forwards the
enriched report downstream and keeps a tamper-evident audit trail.

eGFR is an estimate. Local laboratory policy and licensed clinicians decide how it
is used; local regulations apply.`,
		Version:       version,
		SilenceUsage:  true,
		SilenceErrors: true,
	}
	root.AddCommand(
		newCalcCmd(),
		newServeCmd(version),
		newSendCmd(),
		newConfigCmd(),
		newDryrunCmd(version),
		newDemoCmd(version),
		newOutboxCmd(),
		newLoadCmd(),
		newAuditCmd(),
		newStoreCmd(),
	)
	return root
}
