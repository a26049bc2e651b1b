package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
)

// exitError carries an exit status that is not a failure message, such as
// eval's indicator-based status.
type exitError struct{ code int }

func (e *exitError) Error() string { return fmt.Sprintf("exit status %d", e.code) }

const usage = `halite: sodium safety checks as a CDS Hooks 2.0 service.

Usage:
  halite serve   [--config FILE] [--addr HOST:PORT] [--at RFC3339 (development mode)]
  halite eval    [--hook HOOK] [--service ID] [--at RFC3339] [--json] [--policy-override FILE] [--lab-codes FILE] [--display-timezone ZONE] BUNDLE|REQUEST
  halite suite   [--at RFC3339] [--junit FILE] [--fail-on mismatch|info|warning|critical] [--record] PATH...
  halite check-request [--service ID] [--json] REQUEST
  halite rules   [--policy-override FILE] [--json]
  halite report  [--config FILE] [--from DAY] [--to DAY] [--html FILE]
  halite healthcheck [--url URL]
  halite load    --url URL [--rate N] [--workers N] [--duration D] [--key FILE --iss URL] [--baseline] BUNDLE
  halite keys    --out DIR
  halite token   --key FILE --iss URL --aud URL [--tenant T] [--lifetime 5m]
  halite request --hook HOOK [--service ID] [--lab-codes FILE] BUNDLE
  halite serve-bundle [--addr HOST:PORT] [--page-size N] [--token T] BUNDLE
  halite help

Run "halite COMMAND --help" for a command's flags.
`

// run is the whole program behind main, callable from tests.
func run(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	if len(args) == 0 {
		fmt.Fprint(stderr, usage)
		return &exitError{code: 1}
	}
	var err error
	switch cmd, rest := args[0], args[1:]; cmd {
	case "serve":
		err = serve(ctx, rest, stdout, stderr)
	case "eval":
		err = eval(ctx, rest, stdout, stderr)
	case "suite":
		err = suite(ctx, rest, stdout, stderr)
	case "check-request":
		err = checkRequestCmd(ctx, rest, stdout, stderr)
	case "report":
		err = reportCmd(ctx, rest, stdout, stderr)
	case "load":
		err = loadCmd(ctx, rest, stdout, stderr)
	case "healthcheck":
		err = healthcheck(rest, stdout, stderr)
	case "keys":
		err = keysCmd(rest, stdout, stderr)
	case "token":
		err = tokenCmd(rest, stdout, stderr)
	case "rules":
		err = rulesCmd(rest, stdout, stderr)
	case "request":
		err = request(rest, stdout, stderr)
	case "serve-bundle":
		err = serveBundle(ctx, rest, stdout, stderr)
	case "help", "-h", "--help":
		fmt.Fprint(stdout, usage)
		return nil
	default:
		fmt.Fprint(stderr, usage)
		return fmt.Errorf("unknown command %q", cmd)
	}
	if errors.Is(err, flag.ErrHelp) {
		return nil
	}
	return err
}

// newFlags returns a flag set that reports errors instead of exiting.
func newFlags(name, synopsis string, stderr io.Writer) *flag.FlagSet {
	fs := flag.NewFlagSet(name, flag.ContinueOnError)
	fs.SetOutput(stderr)
	fs.Usage = func() {
		fmt.Fprintf(stderr, "Usage: halite %s\n\nFlags:\n", synopsis)
		fs.PrintDefaults()
	}
	return fs
}

// parseFlags parses args, allowing flags after positional arguments
// ("halite eval bundle.json --json").
func parseFlags(fs *flag.FlagSet, args []string) ([]string, error) {
	var positional []string
	for {
		if err := fs.Parse(args); err != nil {
			return nil, err
		}
		rest := fs.Args()
		if len(rest) == 0 {
			return positional, nil
		}
		positional = append(positional, rest[0])
		args = rest[1:]
	}
}
