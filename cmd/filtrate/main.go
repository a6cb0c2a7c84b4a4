// Command filtrate computes eGFR for laboratory reports in the result stream
// (HL7 v2 over MLLP, FHIR R4 over HTTP), forwards the enriched reports and
// keeps a tamper-evident audit trail. Run "filtrate --help" for the commands.
package main

import (
	"context"
	"fmt"
	"os"
	"os/signal"
	"syscall"
	_ "time/tzdata" // IANA zones for config "timezone" in minimal containers
)

// version is set at build time with -ldflags "-X main.version=...".
var version = "dev"

func main() { os.Exit(run()) }

func run() int {
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	defer stop()
	cmd := newRootCmd(version)
	if err := cmd.ExecuteContext(ctx); err != nil {
		var ec exitCode
		if asExit(err, &ec) {
			return int(ec)
		}
		fmt.Fprintln(os.Stderr, "filtrate:", err)
		return 1
	}
	return 0
}
