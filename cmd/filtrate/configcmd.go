package main

import (
	"errors"
	"fmt"

	"github.com/spf13/cobra"

	"filtrate/config"
)

func newConfigCmd() *cobra.Command {
	cmd := &cobra.Command{
		Use:   "config",
		Short: "Work with configuration files",
	}
	cmd.AddCommand(&cobra.Command{
		Use:   "check FILE",
		Short: "Validate a configuration file; print each problem with its line and key",
		Long: `Validate a configuration file completely (YAML syntax, unknown keys, types,
values, policy, calibration rules, referenced TLS and token files) and print
each problem as FILE:LINE: KEY: MESSAGE, then any warnings. Exits 0 when the
file is valid (warnings allowed), 1 otherwise. Prints the configuration hash
that audit records of this configuration will carry.`,
		Args: cobra.ExactArgs(1),
		RunE: func(cmd *cobra.Command, args []string) error {
			out := cmd.OutOrStdout()
			cfg, err := config.LoadFile(args[0])
			if err != nil {
				var n int
				for _, e := range flatten(err) {
					fmt.Fprintln(out, e)
					n++
				}
				fmt.Fprintf(out, "%s: %d problem(s)\n", args[0], n)
				return exitCode(1)
			}
			for _, w := range cfg.Warnings() {
				fmt.Fprintln(out, "warning:", w)
			}
			fmt.Fprintf(out, "%s: ok (configuration hash %s)\n", args[0], cfg.Hash())
			return nil
		},
	})
	return cmd
}

// flatten lists the errors joined in err (errors.Join), one per problem.
func flatten(err error) []error {
	var j interface{ Unwrap() []error }
	if errors.As(err, &j) {
		var out []error
		for _, e := range j.Unwrap() {
			out = append(out, flatten(e)...)
		}
		return out
	}
	return []error{err}
}
