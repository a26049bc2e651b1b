package main

import (
	"bytes"
	"context"
	"crypto/ecdsa"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"net"
	"net/http"
	"os"
	"runtime"
	"strings"
	"sync/atomic"
	"text/tabwriter"
	"time"

	"github.com/go-jose/go-jose/v4"
	"github.com/golang-jwt/jwt/v5"
	"github.com/google/uuid"
	vegeta "github.com/tsenart/vegeta/v12/lib"
	"golang.org/x/sync/errgroup"
)

// loadCmd replays one hook call against a URL at a fixed rate, or as fast
// as the workers can (--rate 0), for a duration, signing each call with a
// fresh jti when a key is given (before the run with --presign); with
// --baseline it runs the same attack against an in-process server that
// only decodes the JSON body with the standard library and answers
// {"cards":[]}, so the two can be compared.
func loadCmd(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlags("load", "load --url URL [--service ID] [--hook HOOK] [--rate N] [--workers N] [--duration D] "+
		"[--key FILE --iss URL --aud-base URL] [--presign] [--baseline] BUNDLE|REQUEST.json", stderr)
	target := fs.String("url", "", "halite's base `URL`, e.g. http://127.0.0.1:8080 (required)")
	service := fs.String("service", "sodium-infusion-check", "service `id` to call")
	hook := fs.String("hook", "order-sign", "the `hook` of the request built from a bundle")
	rate := fs.Int("rate", 0, "requests per second; 0 is as fast as the workers go")
	workers := fs.Uint64("workers", 8, "concurrent `workers` (the maximum with --rate 0)")
	duration := fs.Duration("duration", 10*time.Second, "how long to attack")
	keyPath := fs.String("key", "", "private JWK `file` (halite keys) to sign each call with a fresh jti")
	iss := fs.String("iss", "", "issuer for the tokens")
	audBase := fs.String("aud-base", "", "public_base_url of the server (the tokens' audience base; default --url)")
	baseline := fs.Bool("baseline", false, "also attack the in-process standard-library baseline with the same body")
	presign := fs.Bool("presign", false, "with --rate and --key, sign every run's tokens (one fresh jti per call) before it starts, "+
		"so that signing does not compete with the server for CPU while latency is measured; each token lives for the run plus "+
		"a minute (the server's auth.max_token_lifetime must allow it) and its jti stays in the server's replay cache as long")
	rest, err := parseFlags(fs, args)
	if err != nil {
		return err
	}
	if *target == "" || len(rest) != 1 {
		return errors.New("load: --url and one BUNDLE or request file are required")
	}
	if *presign && (*rate <= 0 || *keyPath == "") {
		return errors.New("load: --presign needs --rate and --key (at saturation the number of calls is not known beforehand)")
	}
	if *presign && *duration+presignMargin > maxPresignedLifetime {
		return fmt.Errorf("load: --presign is limited to runs of %s (tokens live at most %s)", maxPresignedLifetime-presignMargin, maxPresignedLifetime)
	}
	body, err := loadBody(rest[0], *service, *hook)
	if err != nil {
		return err
	}
	var sign func(lifetime time.Duration) (string, error)
	if *keyPath != "" {
		if sign, err = signer(*keyPath, *iss, strings.TrimRight(firstNonEmpty(*audBase, *target), "/")+"/cds-services/"+*service); err != nil {
			return err
		}
	}
	url := strings.TrimRight(*target, "/") + "/cds-services/" + *service
	runs := []struct{ name, url string }{{"halite", url}}
	if *baseline {
		base, stop, err := startBaseline()
		if err != nil {
			return err
		}
		defer stop()
		runs = append(runs, struct{ name, url string }{"baseline", base + "/cds-services/" + *service})
	}
	tw := tabwriter.NewWriter(stdout, 0, 4, 2, ' ', tabwriter.AlignRight)
	fmt.Fprintf(tw, "target\trequests\tthroughput/s\tp50\tp90\tp99\tmax\terrors\t\n")
	for _, r := range runs {
		tokens, err := tokensFor(sign, *presign, *rate, *duration)
		if err != nil {
			return err
		}
		m, err := attack(ctx, r.url, body, tokens, *rate, *workers, *duration)
		if err != nil {
			return err
		}
		fmt.Fprintf(tw, "%s\t%d\t%.0f\t%s\t%s\t%s\t%s\t%d\t\n", r.name, m.Requests, m.Throughput, round(m.Latencies.P50),
			round(m.Latencies.P90), round(m.Latencies.P99), round(m.Latencies.Max), len(m.Errors)+int(m.Requests)-int(m.StatusCodes["200"]))
	}
	return tw.Flush()
}

func firstNonEmpty(a, b string) string {
	if a != "" {
		return a
	}
	return b
}

func round(d time.Duration) string { return d.Round(10 * time.Microsecond).String() }

// loadBody reads a prepared CDS Hooks request, or builds one from a bundle.
func loadBody(path, service, hook string) ([]byte, error) {
	data, err := os.ReadFile(path)
	if err != nil {
		return nil, fmt.Errorf("load: %w", err)
	}
	var head struct {
		ResourceType string `json:"resourceType"`
	}
	if json.Unmarshal(data, &head) == nil && head.ResourceType != "Bundle" {
		return data, nil // already a request
	}
	var out bytes.Buffer
	if err := request([]string{"--hook", hook, "--service", service, path}, &out, io.Discard); err != nil {
		return nil, err
	}
	return out.Bytes(), nil
}

// Pre-signed tokens must outlive the run by presignMargin (for the time
// the signing itself takes) and live no longer than servers accept by
// default (auth.max_token_lifetime).
const (
	presignMargin        = time.Minute
	maxPresignedLifetime = 5 * time.Minute
)

// tokensFor returns what hands each call its token: nil without a key;
// with presign, rate×duration tokens (each with its own jti) signed now,
// on every core, and handed out in turn, then signed on demand should the
// run need more; otherwise one token signed per call.
func tokensFor(sign func(time.Duration) (string, error), presign bool, rate int, d time.Duration) (func() (string, error), error) {
	if sign == nil {
		return nil, nil
	}
	onDemand := func() (string, error) { return sign(time.Minute) }
	if !presign {
		return onDemand, nil
	}
	lifetime := d + presignMargin
	toks := make([]string, int(float64(rate)*d.Seconds())+rate) // one second spare
	var g errgroup.Group
	g.SetLimit(runtime.GOMAXPROCS(0))
	for i := range toks {
		g.Go(func() (err error) {
			toks[i], err = sign(lifetime)
			return err
		})
	}
	if err := g.Wait(); err != nil {
		return nil, fmt.Errorf("load: presign: %w", err)
	}
	var next atomic.Int64
	return func() (string, error) {
		if i := next.Add(1) - 1; i < int64(len(toks)) {
			return toks[i], nil
		}
		return onDemand()
	}, nil
}

// signer makes a fresh ES384 token, with its own jti, valid for lifetime.
func signer(keyPath, iss, aud string) (func(lifetime time.Duration) (string, error), error) {
	data, err := os.ReadFile(keyPath)
	if err != nil {
		return nil, fmt.Errorf("load: %w", err)
	}
	var jwk jose.JSONWebKey
	if err := json.Unmarshal(data, &jwk); err != nil {
		return nil, fmt.Errorf("load: %s: %w", keyPath, err)
	}
	key, ok := jwk.Key.(*ecdsa.PrivateKey)
	if !ok || iss == "" {
		return nil, errors.New("load: --key must be an EC private JWK and --iss is required with it")
	}
	return func(lifetime time.Duration) (string, error) {
		now := time.Now()
		tok := jwt.NewWithClaims(jwt.SigningMethodES384, jwt.MapClaims{"iss": iss, "sub": iss, "aud": aud,
			"iat": now.Unix(), "exp": now.Add(lifetime).Unix(), "jti": uuid.NewString()})
		tok.Header["kid"] = jwk.KeyID
		return tok.SignedString(key)
	}, nil
}

func attack(ctx context.Context, url string, body []byte, sign func() (string, error), rate int, workers uint64, d time.Duration) (*vegeta.Metrics, error) {
	targeter := func(t *vegeta.Target) error {
		t.Method, t.URL, t.Body = http.MethodPost, url, body
		t.Header = http.Header{"Content-Type": []string{"application/json"}}
		if sign != nil {
			tok, err := sign()
			if err != nil {
				return err
			}
			t.Header.Set("Authorization", "Bearer "+tok)
		}
		return nil
	}
	opts := []func(*vegeta.Attacker){vegeta.Workers(workers), vegeta.MaxWorkers(workers), vegeta.KeepAlive(true)}
	pacer := vegeta.Pacer(vegeta.Rate{Freq: rate, Per: time.Second})
	if rate == 0 {
		pacer = vegeta.ConstantPacer{} // as fast as the workers go
	}
	a := vegeta.NewAttacker(opts...)
	var m vegeta.Metrics
	for res := range a.Attack(targeter, pacer, d, "halite-load") {
		if ctx.Err() != nil {
			a.Stop()
		}
		m.Add(res)
	}
	m.Close()
	return &m, nil
}

// startBaseline serves the bare-JSON ceiling: decode the body into a
// generic value with encoding/json and answer {"cards":[]}.
func startBaseline() (string, func(), error) {
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		return "", nil, fmt.Errorf("baseline: %w", err)
	}
	srv := &http.Server{ReadHeaderTimeout: 5 * time.Second, Handler: http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		var v any
		if err := json.NewDecoder(r.Body).Decode(&v); err != nil {
			http.Error(w, "bad json", http.StatusBadRequest)
			return
		}
		w.Header().Set("Content-Type", "application/json")
		w.Write([]byte(`{"cards":[]}`))
	})}
	go srv.Serve(ln)
	return "http://" + ln.Addr().String(), func() { srv.Close() }, nil
}
