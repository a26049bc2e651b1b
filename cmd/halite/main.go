// Command halite is a CDS Hooks 2.0 service that checks sodium-moving orders
// and drug risks against a patient's sodium, and an offline evaluator for
// FHIR bundles. Run `halite help` for the subcommands.
package main

import (
	"context"
	"errors"
	"fmt"
	"os"
	"os/signal"
	"syscall"
	_ "time/tzdata" // display_timezone works where the host has no zone database (distroless images)
)

func main() {
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	err := run(ctx, os.Args[1:], os.Stdout, os.Stderr)
	stop()
	os.Exit(exitCode(err, os.Stderr))
}

// exitCode maps run's error to the process exit status, printing it first.
func exitCode(err error, stderr *os.File) int {
	var ex *exitError
	switch {
	case err == nil:
		return 0
	case errors.As(err, &ex):
		return ex.code
	default:
		fmt.Fprintln(stderr, "halite:", err)
		return 1
	}
}
