package main

import (
	"github.com/spf13/cobra"

	"filtrate/internal/demo"
)

func newDemoCmd(version string) *cobra.Command {
	opts := demo.Options{ScenarioDir: "testdata/demo", Version: version}
	cmd := &cobra.Command{
		Use:   "demo",
		Short: "Show the whole job on invented demo data",
		Long: `Start the daemon in-process on free loopback ports with a temporary store and a
built-in downstream receiver, send the demo scenario (invented laboratory,
invented patients) over MLLP, and print for each report the patient, the inputs,
the eGFR line and its comments, then a summary of the audit trail. Run it from
the repository root, or pass --scenario.`,
		Args: cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			return demo.Run(cmd.Context(), cmd.OutOrStdout(), opts)
		},
	}
	cmd.Flags().StringVar(&opts.ScenarioDir, "scenario", opts.ScenarioDir, "directory with filtrate.yml and the *.hl7 reports")
	cmd.Flags().StringVar(&opts.KeepDir, "keep", "", "keep the demo store in this directory (to try the audit commands)")
	return cmd
}
