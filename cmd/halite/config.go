package main

import (
	"bytes"
	"errors"
	"fmt"
	"io"
	"net"
	"net/url"
	"os"
	"strconv"
	"strings"
	"time"

	"github.com/halite-cds/halite/fhirmap"
	"github.com/halite-cds/halite/hooks/fhirclient"
	"github.com/halite-cds/halite/rules"
	"go.yaml.in/yaml/v3"
)

// Config is halite serve's configuration: defaults, then the YAML file, then
// HALITE_* environment variables, then command-line flags.
type Config struct {
	ListenAddr      string   `yaml:"listen_addr"`
	PublicBaseURL   string   `yaml:"public_base_url"`
	DevelopmentMode bool     `yaml:"development_mode"`
	MaxBodyBytes    int64    `yaml:"max_body_bytes"`
	CallTimeout     Duration `yaml:"call_timeout"`
	ShutdownGrace   Duration `yaml:"shutdown_grace"`
	DrainDelay      Duration `yaml:"readiness_drain_delay"`
	CORSOrigins     []string `yaml:"cors_allowed_origins"`
	// AppConnectOrigins are origins the sodium course app may call besides
	// the issuers' FHIR servers: their authorization servers' token
	// endpoints (its Content-Security-Policy connect-src).
	AppConnectOrigins []string `yaml:"app_connect_origins"`
	LogLevel          string   `yaml:"log_level"`
	// DisplayTimezone is the IANA zone card text writes times in ("UTC"
	// by default); computation is in UTC whatever it says.
	DisplayTimezone string `yaml:"display_timezone"`
	// DisplayUnits are the units card text writes concentrations in (the
	// canonical units by default); computation is in canonical units.
	DisplayUnits DisplayUnitsConfig `yaml:"display_units"`
	FHIRClient   FHIRClientConfig   `yaml:"fhir_client"`
	// PolicyOverride is the path of a site's policy override (JSON shaped
	// like rules/data/policy.json); empty means the embedded policy.
	PolicyOverride string `yaml:"policy_override"`
	// LabCodes is the path of a site's local laboratory codes (JSON, see
	// fhirmap.ReadLocalCodes); empty means the built-in LOINC table only.
	LabCodes string `yaml:"lab_codes"`
	// AdminAddr, when set, serves /metrics on its own listener instead of
	// the main one.
	AdminAddr string `yaml:"admin_listen_addr"`
	// AdminPprof adds Go's /debug/pprof/ profiles to the admin listener
	// (for performance work; keep that listener private).
	AdminPprof bool `yaml:"admin_pprof"`
	// CaptureDir, in development mode only, is where each answered call is
	// written de-identified, with its expectations, as a suite case.
	CaptureDir string `yaml:"capture_dir"`
	// Auth bounds token verification; Issuers are the trusted EHRs. With no
	// issuer, halite runs in development mode on loopback only.
	Auth    AuthConfig     `yaml:"auth"`
	Issuers []IssuerConfig `yaml:"issuers"`
	Store   StoreConfig    `yaml:"store"`
	Budget  BudgetConfig   `yaml:"budget"`

	// memoryLimit is the process's memory limit the budgets were derived
	// from and are checked against (bytes; not a setting).
	memoryLimit int64
}

// FHIRClientConfig bounds the outbound FHIR client.
type FHIRClientConfig struct {
	Timeout          Duration `yaml:"timeout"`
	MaxResponseBytes int64    `yaml:"max_response_bytes"`
	MaxPages         int      `yaml:"max_pages"`
}

// Duration is a time.Duration written as "5s" in YAML and the environment.
type Duration time.Duration

// UnmarshalYAML reads a Go duration string.
func (d *Duration) UnmarshalYAML(n *yaml.Node) error {
	v, err := time.ParseDuration(n.Value)
	if err != nil {
		return fmt.Errorf("%q is not a duration such as \"5s\"", n.Value)
	}
	*d = Duration(v)
	return nil
}

// defaultConfig is the embedded default: loopback, development mode.
func defaultConfig() Config {
	return Config{
		ListenAddr:      "127.0.0.1:8080",
		DevelopmentMode: true,
		MaxBodyBytes:    8 << 20,
		CallTimeout:     Duration(5 * time.Second),
		ShutdownGrace:   Duration(20 * time.Second),
		LogLevel:        "info",
		FHIRClient: FHIRClientConfig{
			Timeout:  Duration(3 * time.Second),
			MaxPages: 10, // MaxResponseBytes is derived with the budgets
		},
		Auth:  defaultAuthConfig(),
		Store: defaultStoreConfig(),
	}
}

// fileOnlyKeys are set in the YAML file only: lists of structures.
var fileOnlyKeys = map[string]bool{"issuers": true}

// envKeys lists every configuration key with its environment variable.
var envKeys = []struct {
	key string
	set func(c *Config, v string) error
}{
	{"listen_addr", func(c *Config, v string) error { c.ListenAddr = v; return nil }},
	{"public_base_url", func(c *Config, v string) error { c.PublicBaseURL = v; return nil }},
	{"development_mode", func(c *Config, v string) (err error) { c.DevelopmentMode, err = strconv.ParseBool(v); return }},
	{"capture_dir", func(c *Config, v string) error { c.CaptureDir = v; return nil }},
	{"max_body_bytes", func(c *Config, v string) (err error) { c.MaxBodyBytes, err = strconv.ParseInt(v, 10, 64); return }},
	{"call_timeout", func(c *Config, v string) error { return setDuration(&c.CallTimeout, v) }},
	{"shutdown_grace", func(c *Config, v string) error { return setDuration(&c.ShutdownGrace, v) }},
	{"readiness_drain_delay", func(c *Config, v string) error { return setDuration(&c.DrainDelay, v) }},
	{"cors_allowed_origins", func(c *Config, v string) error { c.CORSOrigins = splitList(v); return nil }},
	{"app_connect_origins", func(c *Config, v string) error { c.AppConnectOrigins = splitList(v); return nil }},
	{"log_level", func(c *Config, v string) error { c.LogLevel = v; return nil }},
	{"display_timezone", func(c *Config, v string) error { c.DisplayTimezone = v; return nil }},
	{"display_units.electrolytes", func(c *Config, v string) error { c.DisplayUnits.Electrolytes = v; return nil }},
	{"display_units.glucose", func(c *Config, v string) error { c.DisplayUnits.Glucose = v; return nil }},
	{"display_units.urea", func(c *Config, v string) error { c.DisplayUnits.Urea = v; return nil }},
	{"display_units.creatinine", func(c *Config, v string) error { c.DisplayUnits.Creatinine = v; return nil }},
	{"policy_override", func(c *Config, v string) error { c.PolicyOverride = v; return nil }},
	{"lab_codes", func(c *Config, v string) error { c.LabCodes = v; return nil }},
	{"admin_listen_addr", func(c *Config, v string) error { c.AdminAddr = v; return nil }},
	{"admin_pprof", func(c *Config, v string) (err error) { c.AdminPprof, err = strconv.ParseBool(v); return }},
	{"store.dsn", func(c *Config, v string) error { c.Store.DSN = v; return nil }},
	{"store.hash_key_file", func(c *Config, v string) error { c.Store.HashKeyFile = v; return nil }},
	{"store.retention", func(c *Config, v string) error { return setDuration(&c.Store.Retention, v) }},
	{"store.purge_interval", func(c *Config, v string) error { return setDuration(&c.Store.PurgeEvery, v) }},
	{"store.sqlite_synchronous", func(c *Config, v string) error { c.Store.SQLiteSynchronous = v; return nil }},
	{"auth.algorithms", func(c *Config, v string) error { c.Auth.Algorithms = splitList(v); return nil }},
	{"auth.clock_skew", func(c *Config, v string) error { return setDuration(&c.Auth.ClockSkew, v) }},
	{"auth.max_token_lifetime", func(c *Config, v string) error { return setDuration(&c.Auth.MaxLifetime, v) }},
	{"auth.jwks_timeout", func(c *Config, v string) error { return setDuration(&c.Auth.JWKSTimeout, v) }},
	{"auth.jwks_refresh", func(c *Config, v string) error { return setDuration(&c.Auth.JWKSRefresh, v) }},
	{"auth.jwks_min_refresh", func(c *Config, v string) error { return setDuration(&c.Auth.JWKSMinRefresh, v) }},
	{"auth.jwks_stale_grace", func(c *Config, v string) error { return setDuration(&c.Auth.JWKSStaleGrace, v) }},
	{"auth.jwks_max_bytes", func(c *Config, v string) (err error) { c.Auth.JWKSMaxBytes, err = strconv.ParseInt(v, 10, 64); return }},
	{"fhir_client.timeout", func(c *Config, v string) error { return setDuration(&c.FHIRClient.Timeout, v) }},
	{"fhir_client.max_response_bytes", func(c *Config, v string) (err error) {
		c.FHIRClient.MaxResponseBytes, err = strconv.ParseInt(v, 10, 64)
		return
	}},
	{"fhir_client.max_pages", func(c *Config, v string) (err error) { c.FHIRClient.MaxPages, err = strconv.Atoi(v); return }},
	{"budget.process_bytes", func(c *Config, v string) (err error) {
		c.Budget.ProcessBytes, err = strconv.ParseInt(v, 10, 64)
		return
	}},
	{"budget.call_bytes", func(c *Config, v string) (err error) { c.Budget.CallBytes, err = strconv.ParseInt(v, 10, 64); return }},
	{"store.queue_size", func(c *Config, v string) (err error) { c.Store.QueueSize, err = strconv.Atoi(v); return }},
}

// envName is the environment variable for a key: HALITE_ and the key in
// upper case with dots as underscores.
func envName(key string) string {
	return "HALITE_" + strings.ToUpper(strings.ReplaceAll(key, ".", "_"))
}

func setDuration(d *Duration, v string) error {
	p, err := time.ParseDuration(v)
	*d = Duration(p)
	return err
}

func splitList(v string) []string {
	var out []string
	for _, s := range strings.Split(v, ",") {
		if s = strings.TrimSpace(s); s != "" {
			out = append(out, s)
		}
	}
	return out
}

// loadConfig builds the configuration from the file at path (else the
// one HALITE_CONFIG names; none if both are empty) and the environment,
// deriving the byte budgets left unset from the process's memory limit.
func loadConfig(path string, getenv func(string) string) (Config, error) {
	cfg, err := readConfig(path, getenv)
	cfg.deriveBudgets(memoryLimit())
	return cfg, err
}

// readConfig is loadConfig without the derived budgets.
func readConfig(path string, getenv func(string) string) (Config, error) {
	if path == "" {
		path = getenv("HALITE_CONFIG")
	}
	cfg := defaultConfig()
	if path != "" {
		data, err := os.ReadFile(path)
		if err != nil {
			return cfg, fmt.Errorf("config: %w", err)
		}
		dec := yaml.NewDecoder(bytes.NewReader(data))
		dec.KnownFields(true)
		if err := dec.Decode(&cfg); err != nil && !errors.Is(err, io.EOF) {
			return cfg, fmt.Errorf("config %s: %w", path, err)
		}
	}
	for _, k := range envKeys {
		if v := getenv(envName(k.key)); v != "" {
			if err := k.set(&cfg, v); err != nil {
				return cfg, fmt.Errorf("config: %s (from %s): %q is not valid", k.key, envName(k.key), v)
			}
		}
	}
	return cfg, nil
}

// loadRuleset loads the embedded policy with the site override at path
// applied (none if path is empty).
func loadRuleset(path string) (*rules.Ruleset, error) {
	if path == "" {
		return rules.Load()
	}
	data, err := os.ReadFile(path)
	if err != nil {
		return nil, fmt.Errorf("policy_override: %w", err)
	}
	rs, err := rules.LoadWithOverride(data)
	if err != nil {
		return nil, fmt.Errorf("policy_override %s: %w", path, err)
	}
	return rs, nil
}

// displayZone is the IANA zone name's location; empty means UTC.
func displayZone(name string) (*time.Location, error) {
	if name == "" {
		return time.UTC, nil
	}
	loc, err := time.LoadLocation(name)
	if err != nil {
		return nil, fmt.Errorf("%q is not an IANA time zone name such as Europe/Paris", name)
	}
	return loc, nil
}

// DisplayUnitsConfig names the units card text writes concentrations in.
type DisplayUnitsConfig struct {
	Electrolytes string `yaml:"electrolytes"` // mmol/L or mEq/L (sodium, potassium)
	Glucose      string `yaml:"glucose"`      // mmol/L or mg/dL
	Urea         string `yaml:"urea"`         // mmol/L (urea) or mg/dL (urea nitrogen)
	Creatinine   string `yaml:"creatinine"`   // umol/L or mg/dL
}

func (u DisplayUnitsConfig) units() rules.DisplayUnits {
	return rules.DisplayUnits{Electrolytes: u.Electrolytes, Glucose: u.Glucose, Urea: u.Urea, Creatinine: u.Creatinine}
}

// parseDisplayUnits reads "electrolytes=mEq/L,glucose=mg/dL" (the
// members of display_units, each at most once).
func parseDisplayUnits(list string) (DisplayUnitsConfig, error) {
	var u DisplayUnitsConfig
	fields := map[string]*string{"electrolytes": &u.Electrolytes, "glucose": &u.Glucose, "urea": &u.Urea, "creatinine": &u.Creatinine}
	seen := map[string]bool{}
	for _, item := range splitList(list) {
		name, unit, ok := strings.Cut(item, "=")
		name = strings.TrimSpace(name)
		dst, known := fields[name]
		if !ok || !known || seen[name] {
			return u, fmt.Errorf("%q is not one of electrolytes=, glucose=, urea=, creatinine= given once", item)
		}
		seen[name], *dst = true, strings.TrimSpace(unit)
	}
	return u, u.units().Validate()
}

// displayRuleset is rs writing card text in the zone named and the units
// given.
func displayRuleset(rs *rules.Ruleset, zone string, units DisplayUnitsConfig) (*rules.Ruleset, error) {
	loc, err := displayZone(zone)
	if err != nil {
		return nil, err
	}
	if err := units.units().Validate(); err != nil {
		return nil, fmt.Errorf("display_units: %w", err)
	}
	return rs.WithDisplay(rules.Display{Zone: loc, Units: units.units()}), nil
}

// loadLabCodes reads a site's local laboratory codes at path, checking every
// entry (none if path is empty: the built-in LOINC table).
func loadLabCodes(path string) (*fhirmap.Codes, error) {
	if path == "" {
		return fhirmap.BuiltinCodes(), nil
	}
	data, err := os.ReadFile(path)
	if err != nil {
		return nil, fmt.Errorf("lab_codes: %w", err)
	}
	codes, err := fhirmap.ReadLocalCodes(data)
	if err != nil {
		return nil, fmt.Errorf("lab_codes %s: %w", path, err)
	}
	return codes, nil
}

// validate checks every key, naming the first that is wrong.
func (c Config) validate() error {
	if _, err := displayZone(c.DisplayTimezone); err != nil {
		return fmt.Errorf("config: display_timezone: %w", err)
	}
	if err := c.DisplayUnits.units().Validate(); err != nil {
		return fmt.Errorf("config: display_units.%w", err)
	}
	if c.AdminPprof {
		if c.AdminAddr == "" {
			return errors.New("config: admin_pprof: needs admin_listen_addr (profiles are never served on the main listener)")
		}
		if h, _, err := net.SplitHostPort(c.AdminAddr); err != nil || !privateHost(h) {
			return errors.New("config: admin_pprof: admin_listen_addr must be a loopback or private IP address, not a wildcard or public one")
		}
	}
	host, _, err := net.SplitHostPort(c.ListenAddr)
	if err != nil {
		return fmt.Errorf("config: listen_addr: %q is not HOST:PORT", c.ListenAddr)
	}
	if len(c.Issuers) == 0 && !fhirclient.IsLoopback(host) {
		return fmt.Errorf("config: listen_addr: without trusted issuers halite accepts unsigned calls, so it listens "+
			"on a loopback address only, not %q; configure issuers to serve other addresses", host)
	}
	if c.CaptureDir != "" && !c.DevelopmentMode {
		return fmt.Errorf("config: capture_dir is for development mode only (development_mode: true): a service never writes the calls it receives")
	}
	if len(c.Issuers) == 0 && !c.DevelopmentMode {
		return fmt.Errorf("config: development_mode: false needs at least one trusted issuer (issuers)")
	}
	if err := c.validateTrust(); err != nil {
		return err
	}
	if err := c.Store.validate(c.DevelopmentMode); err != nil {
		return err
	}
	if c.PublicBaseURL != "" {
		u, err := url.Parse(c.PublicBaseURL)
		if err != nil || u.Host == "" || (u.Scheme != "https" && u.Scheme != "http") {
			return fmt.Errorf("config: public_base_url: %q is not an absolute http(s) URL", c.PublicBaseURL)
		}
	}
	if c.MaxBodyBytes <= 0 || c.MaxBodyBytes > 1<<30 {
		return fmt.Errorf("config: max_body_bytes: must be between 1 and 1073741824")
	}
	if c.CallTimeout <= 0 || time.Duration(c.CallTimeout) > time.Minute {
		return fmt.Errorf("config: call_timeout: must be positive and at most 1m")
	}
	if c.ShutdownGrace < 0 {
		return fmt.Errorf("config: shutdown_grace: must not be negative")
	}
	if c.DrainDelay < 0 || time.Duration(c.DrainDelay) > 5*time.Minute {
		return fmt.Errorf("config: readiness_drain_delay: must be between 0s and 5m")
	}
	for key, origins := range map[string][]string{"cors_allowed_origins": c.CORSOrigins, "app_connect_origins": c.AppConnectOrigins} {
		for i, o := range origins {
			u, err := url.Parse(o)
			if o == "*" || err != nil || u.Host == "" || (u.Path != "" && u.Path != "/") || u.RawQuery != "" || strings.ContainsAny(o, " ;'") {
				return fmt.Errorf("config: %s[%d]: %q is not an origin such as https://ehr.example.org", key, i, o)
			}
		}
	}
	if _, ok := logLevels[c.LogLevel]; !ok {
		return fmt.Errorf("config: log_level: %q is not one of debug, info, warn, error", c.LogLevel)
	}
	if err := c.validateBudgets(); err != nil {
		return err
	}
	f := c.FHIRClient
	switch {
	case f.Timeout <= 0:
		return fmt.Errorf("config: fhir_client.timeout: must be positive")
	case f.MaxPages < 1 || f.MaxPages > 100:
		return fmt.Errorf("config: fhir_client.max_pages: must be between 1 and 100")
	}
	return nil
}

// privateHost reports whether h is a loopback or private-range IP address.
func privateHost(h string) bool {
	ip := net.ParseIP(h)
	return ip != nil && (ip.IsLoopback() || ip.IsPrivate())
}
