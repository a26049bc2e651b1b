package main

import (
	"context"
	"encoding/json"
	"fmt"
	"io"
	"strings"
	"text/tabwriter"

	"github.com/halite-cds/halite/hooks"
	"github.com/halite-cds/halite/rules"
)

// checkRequestCmd prints every problem of an EHR's request against CDS
// Hooks 2.0 and the services of its hook (or --service), each with its
// JSON path; the exit status is 1 when any is an error.
func checkRequestCmd(_ context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlags("check-request", "check-request [--service ID] [--json] REQUEST", stderr)
	service := fs.String("service", "", "check against this service `id` only (default: every service of the request's hook)")
	asJSON := fs.Bool("json", false, "print the problems as a JSON array of {severity, path, message}")
	path, err := parseBundleArgs(fs, args)
	if err != nil {
		return err
	}
	data, err := readInput(path)
	if err != nil {
		return fmt.Errorf("check-request: read %s: %w", path, err)
	}
	rs, err := rules.Load()
	if err != nil {
		return err
	}
	reg := hooks.NewRegistry(nil, rs)
	var head struct {
		Hook string `json:"hook"`
	}
	_ = json.Unmarshal(data, &head) // CheckRequest reports a request that is not an object or has no hook
	var svcs []hooks.Service
	if *service != "" {
		svc, ok := reg.Lookup(*service)
		if !ok {
			return fmt.Errorf("--service: no service %q", *service)
		}
		svcs = []hooks.Service{svc}
		if head.Hook != "" && !svc.Serves(head.Hook) {
			return fmt.Errorf("--service: %s does not serve the request's hook %q", svc.ID, head.Hook)
		}
	} else {
		svcs = reg.ForHook(head.Hook)
	}
	problems := hooks.CheckRequest(data, svcs)
	if *asJSON {
		out := make([]map[string]string, 0, len(problems))
		for _, p := range problems {
			out = append(out, map[string]string{"severity": string(p.Severity), "path": p.Path, "message": p.Message})
		}
		if err := writeJSON(stdout, out); err != nil {
			return err
		}
	} else {
		names := make([]string, len(svcs))
		for i, s := range svcs {
			names[i] = s.ID
		}
		fmt.Fprintf(stdout, "%s: hook %q, checked against CDS Hooks 2.0 and %s\n", path, head.Hook, strings.Join(names, ", "))
		tw := tabwriter.NewWriter(stdout, 0, 0, 2, ' ', 0)
		for _, p := range problems {
			fmt.Fprintf(tw, "%s\t%s\t%s\n", strings.ToUpper(string(p.Severity)), p.Path, p.Message)
		}
		tw.Flush()
	}
	counts := map[hooks.Severity]int{}
	for _, p := range problems {
		counts[p.Severity]++
	}
	if !*asJSON {
		fmt.Fprintf(stdout, "%d errors, %d warnings, %d notes\n", counts[hooks.SeverityError], counts[hooks.SeverityWarning], counts[hooks.SeverityInfo])
	}
	if counts[hooks.SeverityError] > 0 {
		return &exitError{code: exitFailure}
	}
	return nil
}
