package main

import (
	"os"
	"path/filepath"
	"reflect"
	"strings"
	"testing"
	"time"
)

func TestConfigDefaultsAreValid(t *testing.T) {
	cfg, err := loadConfig("", func(string) string { return "" })
	if err != nil {
		t.Fatal(err)
	}
	if err := cfg.validate(); err != nil {
		t.Fatalf("embedded defaults are invalid: %v", err)
	}
	if cfg.ListenAddr != "127.0.0.1:8080" || !cfg.DevelopmentMode || cfg.MaxBodyBytes != 8<<20 {
		t.Errorf("defaults %+v", cfg)
	}
}

func TestConfigFileAndEnvironment(t *testing.T) {
	path := filepath.Join(t.TempDir(), "halite.yaml")
	os.WriteFile(path, []byte("listen_addr: 127.0.0.1:9090\ncall_timeout: 2s\nfhir_client:\n  max_pages: 4\n"), 0o644)
	env := map[string]string{"HALITE_FHIR_CLIENT_MAX_PAGES": "7", "HALITE_CORS_ALLOWED_ORIGINS": "https://a.example, https://b.example"}
	cfg, err := loadConfig(path, func(k string) string { return env[k] })
	if err != nil {
		t.Fatal(err)
	}
	if cfg.ListenAddr != "127.0.0.1:9090" || time.Duration(cfg.CallTimeout) != 2*time.Second {
		t.Errorf("file values not applied: %+v", cfg)
	}
	if cfg.FHIRClient.MaxPages != 7 || len(cfg.CORSOrigins) != 2 || cfg.CORSOrigins[1] != "https://b.example" {
		t.Errorf("environment must override the file: %+v", cfg)
	}
	if err := cfg.validate(); err != nil {
		t.Error(err)
	}
}

// TestConfigErrorsNameTheKey: every invalid setting is refused at start-up
// with the key named.
func TestConfigErrorsNameTheKey(t *testing.T) {
	for _, tc := range []struct {
		yaml, env, key string
	}{
		{"listen_addr: nonsense\n", "", "listen_addr"},
		{"listen_addr: 10.1.2.3:8080\n", "", "listen_addr"},
		{"development_mode: false\n", "", "development_mode"},
		{"public_base_url: not a url\n", "", "public_base_url"},
		{"max_body_bytes: 0\n", "", "max_body_bytes"},
		{"call_timeout: 0s\n", "", "call_timeout"},
		{"cors_allowed_origins: ['*']\n", "", "cors_allowed_origins[0]"},
		{"log_level: loud\n", "", "log_level"},
		{"fhir_client:\n  max_pages: 0\n", "", "fhir_client.max_pages"},
		{"lisen_addr: 127.0.0.1:1\n", "", "lisen_addr"},
		{"call_timeout: soon\n", "", "duration"},
		{"", "HALITE_MAX_BODY_BYTES=lots", "max_body_bytes"},
		{"", "HALITE_DEVELOPMENT_MODE=maybe", "development_mode"},
		{"auth:\n  algorithms: [HS384]\n", "", "auth.algorithms[0]"},
		{"auth:\n  max_token_lifetime: 0s\n", "", "auth.max_token_lifetime"},
		{"auth:\n  jwks_refresh: 1m\n  jwks_min_refresh: 5m\n", "", "auth.jwks_min_refresh"},
		{"auth:\n  jwks_stale_grace: -1h\n", "", "auth.jwks_stale_grace"},
		{"admin_pprof: true\n", "", "admin_pprof"},
		{"store:\n  sqlite_synchronous: off\n", "", "store.sqlite_synchronous"},
		{"", "HALITE_STORE_SQLITE_SYNCHRONOUS=FULL", "store.sqlite_synchronous"},
		{"store:\n  dsn: postgres://db.example.org/halite\n  sqlite_synchronous: normal\n", "", "store.sqlite_synchronous"},
		{"issuers:\n  - iss: https://ehr.example.org\n    jwks_url: https://ehr.example.org/jwks\n", "", "public_base_url"},
		{"public_base_url: https://halite.example.org\nissuers:\n  - iss: https://ehr.example.org\n", "", "issuers[0]"},
		{"public_base_url: https://halite.example.org\nissuers:\n  - iss: https://ehr.example.org\n    jwks_url: http://ehr.example.org/jwks\n", "", "issuers[0]"},
		{"public_base_url: https://halite.example.org\nissuers:\n  - iss: https://a\n    jwks_url: https://a/j\n  - iss: https://a\n    jwks_url: https://a/j\n", "", "issuers[1].iss"},
		{"public_base_url: https://halite.example.org\nissuers:\n  - iss: https://a\n    jwks_url: https://a/j\n    fhir_servers:\n      - base_url: http://fhir.example.org\n", "", "issuers[0].fhir_servers[0].base_url"},
		{"budget:\n  process_bytes: -1\n", "", "budget.process_bytes"},
		{"budget:\n  process_bytes: 20000000\n  call_bytes: 30000000\n", "", "budget.call_bytes"},
		{"budget:\n  process_bytes: 20000000\n  call_bytes: 10000000\nfhir_client:\n  max_response_bytes: 10000001\n", "", "fhir_client.max_response_bytes"},
		{"budget:\n  process_bytes: 20000000\n  call_bytes: 10000000\nmax_body_bytes: 30000000\n", "", "max_body_bytes"},
		{"", "HALITE_BUDGET_PROCESS_BYTES=4000000000000", "budget.process_bytes"},
		{"store:\n  queue_size: 0\n", "", "store.queue_size"},
	} {
		path := filepath.Join(t.TempDir(), "c.yaml")
		os.WriteFile(path, []byte(tc.yaml), 0o644)
		name, value, _ := strings.Cut(tc.env, "=")
		cfg, err := loadConfig(path, func(k string) string {
			if k == name {
				return value
			}
			return ""
		})
		if err == nil {
			err = cfg.validate()
		}
		if err == nil || !strings.Contains(err.Error(), tc.key) {
			t.Errorf("%q %q: got %v, want an error naming %s", tc.yaml, tc.env, err, tc.key)
		}
	}
}

func TestEnvNames(t *testing.T) {
	for key, want := range map[string]string{
		"listen_addr": "HALITE_LISTEN_ADDR", "fhir_client.max_response_bytes": "HALITE_FHIR_CLIENT_MAX_RESPONSE_BYTES"} {
		if got := envName(key); got != want {
			t.Errorf("envName(%s) = %s, want %s", key, got, want)
		}
	}
}

// TestEveryKeyHasAnEnvironmentVariable walks Config's YAML keys.
func TestEveryKeyHasAnEnvironmentVariable(t *testing.T) {
	have := map[string]bool{}
	for _, k := range envKeys {
		have[k.key] = true
	}
	var walk func(typ reflect.Type, prefix string)
	walk = func(typ reflect.Type, prefix string) {
		for i := 0; i < typ.NumField(); i++ {
			f := typ.Field(i)
			if !f.IsExported() {
				continue // derived, not a setting
			}
			key := prefix + strings.Split(f.Tag.Get("yaml"), ",")[0]
			if f.Type.Kind() == reflect.Struct && f.Type != reflect.TypeOf(Duration(0)) {
				walk(f.Type, key+".")
				continue
			}
			if !have[key] && !fileOnlyKeys[key] {
				t.Errorf("config key %s has no environment variable", key)
			}
		}
	}
	walk(reflect.TypeOf(Config{}), "")
}

// TestExampleConfigIsValid keeps deploy/halite.example.yaml loadable.
func TestExampleConfigIsValid(t *testing.T) {
	cfg, err := loadConfig(filepath.Join("..", "..", "deploy", "halite.example.yaml"), func(string) string { return "" })
	if err != nil {
		t.Fatal(err)
	}
	if err := cfg.validate(); err != nil {
		t.Fatal(err)
	}
	def := defaultConfig()
	def.deriveBudgets(memoryLimit())
	if cfg.MaxBodyBytes != def.MaxBodyBytes || cfg.CallTimeout != def.CallTimeout || cfg.FHIRClient != def.FHIRClient {
		t.Errorf("the example says it shows the defaults, but differs: %+v vs %+v", cfg, def)
	}
}

// TestBudgetsFromMemoryLimit: left unset, the byte budgets follow the
// process's memory limit (GOMEMLIMIT, else the cgroup's, else 256 MiB);
// set ones are kept.
func TestBudgetsFromMemoryLimit(t *testing.T) {
	const mib = 1 << 20
	for _, tc := range []struct {
		name                       string
		limit                      int64
		set                        BudgetConfig
		process, call, maxResponse int64
	}{
		{"the deployed 100 MiB", 100 * mib, BudgetConfig{}, 20 * mib, 5 * mib, 5 * mib},
		{"1 GiB: one answer stays at 32 MiB", 1024 * mib, BudgetConfig{}, 1024 * mib / 5, 1024 * mib / 5 / 4, 32 * mib},
		{"unknown: 256 MiB assumed", 0, BudgetConfig{}, 256 * mib / 5, 256 * mib / 5 / 4, 256 * mib / 5 / 4},
		{"set values are kept", 100 * mib, BudgetConfig{ProcessBytes: 40 * mib, CallBytes: 2 * mib}, 40 * mib, 2 * mib, 2 * mib},
	} {
		cfg := defaultConfig()
		cfg.Budget = tc.set
		cfg.deriveBudgets(tc.limit)
		if cfg.Budget.ProcessBytes != tc.process || cfg.Budget.CallBytes != tc.call || cfg.FHIRClient.MaxResponseBytes != tc.maxResponse {
			t.Errorf("%s: process %d call %d max_response %d; want %d %d %d", tc.name, cfg.Budget.ProcessBytes, cfg.Budget.CallBytes,
				cfg.FHIRClient.MaxResponseBytes, tc.process, tc.call, tc.maxResponse)
		}
		if err := cfg.validate(); err != nil {
			t.Errorf("%s: %v", tc.name, err)
		}
	}
}
