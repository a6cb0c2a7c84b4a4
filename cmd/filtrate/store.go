package main

import (
	"fmt"
	"strconv"
	"strings"

	"github.com/spf13/cobra"

	"filtrate/store"
)

func newStoreCmd() *cobra.Command {
	cmd := &cobra.Command{
		Use:   "store",
		Short: "Manage the store's database",
	}
	var cfgPath string
	migrate := &cobra.Command{
		Use:   "migrate [--config FILE]",
		Short: "Apply pending schema migrations to the store",
		Long: `Apply the schema migrations this build knows and the store has not applied yet,
and print the versions applied (or that the schema is up to date). Run it as
the database role that owns the schema (see store/ROLES.md); the daemon can
then run as a role without DDL rights. Migrations never drop audit data.`,
		Args: cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			cfg, err := auditConfig(cfgPath)
			if err != nil {
				return err
			}
			applied, err := store.Migrate(cmd.Context(), cfg.Store)
			if err != nil {
				return fmt.Errorf("store migrate: %w", err)
			}
			if len(applied) == 0 {
				fmt.Fprintln(cmd.OutOrStdout(), "store migrate: schema up to date")
				return nil
			}
			vs := make([]string, len(applied))
			for i, v := range applied {
				vs[i] = strconv.FormatInt(v, 10)
			}
			fmt.Fprintf(cmd.OutOrStdout(), "store migrate: applied %s\n", strings.Join(vs, ", "))
			return nil
		},
	}
	migrate.Flags().StringVar(&cfgPath, "config", "", "configuration file (YAML) naming the store; default: built-in (file:filtrate.db)")
	cmd.AddCommand(migrate)
	return cmd
}
