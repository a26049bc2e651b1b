package main

import (
	"encoding/json"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"strings"

	"github.com/halite-cds/halite/fhirmap"
	"github.com/halite-cds/halite/hooks"
	"github.com/halite-cds/halite/rules"
)

// stringList is a repeatable string flag.
type stringList []string

func (s *stringList) String() string     { return strings.Join(*s, ",") }
func (s *stringList) Set(v string) error { *s = append(*s, v); return nil }

// bundleFlags are the flags eval and request share.
type bundleFlags struct {
	hook, service, user, encounter string
	selections                     stringList
	labCodes                       string
}

func (b *bundleFlags) register(fs *flag.FlagSet) {
	fs.StringVar(&b.hook, "hook", "", "the `hook` to simulate: order-sign, order-select or patient-view (required)")
	fs.StringVar(&b.service, "service", "", "run only the service with this `id` (default: every service on the hook)")
	fs.StringVar(&b.user, "user", "Practitioner/cli-user", "context.userId `reference`")
	fs.StringVar(&b.encounter, "encounter", "", "context.encounterId: the `id` of the encounter the call is made in (default: none)")
	fs.Var(&b.selections, "select", "order-select: a draft order `reference` to select, repeatable (default: all drafts)")
	fs.StringVar(&b.labCodes, "lab-codes", "", "read results also by a site's local laboratory codes in `file` (as lab_codes does for the server)")
}

// registry returns the services, reading the flags' local lab codes; rs
// gives the drug codes prefetch templates ask for.
func (b *bundleFlags) registry(rs *rules.Ruleset) (*hooks.Registry, error) {
	codes, err := loadLabCodes(b.labCodes)
	if err != nil {
		return nil, err
	}
	return hooks.NewRegistry(codes, rs), nil
}

// services returns the services to run for the flags.
func (b *bundleFlags) services(reg *hooks.Registry) ([]hooks.Service, error) {
	if b.hook == "" {
		return nil, errors.New("--hook is required (order-sign, order-select or patient-view)")
	}
	if b.service != "" {
		svc, ok := reg.Lookup(b.service)
		if !ok {
			return nil, fmt.Errorf("--service: no service %q", b.service)
		}
		if !svc.Serves(b.hook) {
			return nil, fmt.Errorf("--service: %s does not serve hook %q", svc.ID, b.hook)
		}
		return []hooks.Service{svc}, nil
	}
	svcs := reg.ForHook(b.hook)
	if len(svcs) == 0 {
		return nil, fmt.Errorf("--hook: no service serves %q", b.hook)
	}
	return svcs, nil
}

func (b *bundleFlags) options() hooks.RequestOptions {
	return hooks.RequestOptions{Hook: b.hook, UserID: b.user, EncounterID: b.encounter, Selections: b.selections}
}

// readBundle reads a FHIR Bundle from path ("-" for standard input).
func readBundle(path string) (*fhirmap.Bundle, error) {
	data, err := readInput(path)
	if err != nil {
		return nil, fmt.Errorf("read bundle: %w", err)
	}
	return parseBundle(path, data)
}

// readInput reads the file at path, or standard input for "-".
func readInput(path string) ([]byte, error) {
	if path == "-" {
		return io.ReadAll(os.Stdin)
	}
	return os.ReadFile(path)
}

// parseBundle reads data, from path, as a FHIR R4 Bundle halite reads.
func parseBundle(path string, data []byte) (*fhirmap.Bundle, error) {
	data, err := fhirmap.ReadDocument(data)
	if err != nil {
		return nil, fmt.Errorf("%s: %w: a FHIR R4 Bundle is a JSON object", path, err)
	}
	b, err := fhirmap.ParseBundle(data)
	if err != nil {
		return nil, fmt.Errorf("%s: %w", path, err)
	}
	for i, e := range b.Entries {
		if r, err := fhirmap.ReadResource(e.Resource); err == nil {
			if err := fhirmap.CheckR4(r); err != nil {
				return nil, fmt.Errorf("%s: entry[%d]: %w", path, i, err)
			}
		}
	}
	switch b.Type {
	case "collection", "searchset", "transaction", "batch":
		return b, nil
	case "":
		return nil, fmt.Errorf("%s: Bundle.type is missing (use collection)", path)
	default:
		return nil, fmt.Errorf("%s: Bundle.type %q: halite reads collection, searchset, transaction or batch bundles", path, b.Type)
	}
}

// parseBundleArgs parses the flags and returns the one BUNDLE argument.
func parseBundleArgs(fs *flag.FlagSet, args []string) (string, error) {
	args, err := parseFlags(fs, args)
	if err != nil {
		return "", err
	}
	switch len(args) {
	case 1:
		return args[0], nil
	case 0:
		return "", errors.New("a BUNDLE file is required (\"-\" reads standard input)")
	default:
		return "", fmt.Errorf("one BUNDLE file expected, got %d arguments", len(args))
	}
}

// writeJSON writes v indented, ending with a newline.
func writeJSON(w io.Writer, v any) error {
	enc := json.NewEncoder(w)
	enc.SetIndent("", "  ")
	enc.SetEscapeHTML(false)
	return enc.Encode(v)
}

// request prints the CDS Hooks request an EHR would send for the bundle.
func request(args []string, stdout, stderr io.Writer) error {
	fs := newFlags("request", "request --hook HOOK [--service ID] [flags] BUNDLE", stderr)
	var bf bundleFlags
	bf.register(fs)
	server := fs.String("fhir-server", "", "send this `URL` as fhirServer")
	token := fs.String("access-token", "", "with --fhir-server, send this `token` in fhirAuthorization")
	noPrefetch := fs.Bool("no-prefetch", false, "leave prefetch out, so the service must fetch from --fhir-server")
	path, err := parseBundleArgs(fs, args)
	if err != nil {
		return err
	}
	rs, err := rules.Load()
	if err != nil {
		return err
	}
	reg, err := bf.registry(rs)
	if err != nil {
		return err
	}
	svcs, err := bf.services(reg)
	if err != nil {
		return err
	}
	b, err := readBundle(path)
	if err != nil {
		return err
	}
	opt := bf.options()
	opt.FHIRServer, opt.AccessToken, opt.OmitPrefetch = *server, *token, *noPrefetch
	out := map[string]*hooks.Request{}
	for _, svc := range svcs {
		req, err := hooks.BuildRequest(b, svc, opt)
		if err != nil {
			return err
		}
		out[svc.ID] = req
	}
	if bf.service != "" {
		return writeJSON(stdout, out[bf.service])
	}
	return writeJSON(stdout, out)
}
