package main

import (
	"crypto"
	"crypto/ecdsa"
	"crypto/elliptic"
	"crypto/rand"
	"encoding/base64"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"time"

	"github.com/go-jose/go-jose/v4"
	"github.com/golang-jwt/jwt/v5"
	"github.com/google/uuid"
)

// keysCmd makes a local test issuer: an ES384 key pair, written as a
// private JWK (mode 0600) and a public JWKS to trust in halite's config.
func keysCmd(args []string, stdout, stderr io.Writer) error {
	fs := newFlags("keys", "keys --out DIR", stderr)
	out := fs.String("out", "", "`directory` to write issuer-private.jwk and issuer-jwks.json into (required)")
	if _, err := parseFlags(fs, args); err != nil {
		return err
	}
	if *out == "" {
		return errors.New("keys: --out is required")
	}
	key, err := ecdsa.GenerateKey(elliptic.P384(), rand.Reader)
	if err != nil {
		return fmt.Errorf("keys: %w", err)
	}
	pub := jose.JSONWebKey{Key: &key.PublicKey, Algorithm: "ES384", Use: "sig"}
	thumb, err := pub.Thumbprint(crypto.SHA256)
	if err != nil {
		return fmt.Errorf("keys: %w", err)
	}
	pub.KeyID = base64.RawURLEncoding.EncodeToString(thumb)
	priv := jose.JSONWebKey{Key: key, KeyID: pub.KeyID, Algorithm: "ES384", Use: "sig"}
	privJSON, err := json.MarshalIndent(priv, "", "  ")
	if err != nil {
		return fmt.Errorf("keys: %w", err)
	}
	setJSON, err := json.MarshalIndent(jose.JSONWebKeySet{Keys: []jose.JSONWebKey{pub}}, "", "  ")
	if err != nil {
		return fmt.Errorf("keys: %w", err)
	}
	if err := os.MkdirAll(*out, 0o700); err != nil {
		return fmt.Errorf("keys: %w", err)
	}
	privPath, setPath := filepath.Join(*out, "issuer-private.jwk"), filepath.Join(*out, "issuer-jwks.json")
	if err := os.WriteFile(privPath, privJSON, 0o600); err != nil {
		return fmt.Errorf("keys: %w", err)
	}
	if err := os.WriteFile(setPath, setJSON, 0o644); err != nil {
		return fmt.Errorf("keys: %w", err)
	}
	fmt.Fprintf(stdout, "wrote %s (private, keep it secret) and %s (trust it as an issuer's jwks_file); kid %s\n",
		privPath, setPath, pub.KeyID)
	return nil
}

// tokenCmd signs a short-lived token as a local test issuer, with a fresh
// jti, for the URL to be called.
func tokenCmd(args []string, stdout, stderr io.Writer) error {
	fs := newFlags("token", "token --key FILE --iss URL --aud URL [--tenant T] [--lifetime 5m]", stderr)
	keyPath := fs.String("key", "", "private JWK `file` written by halite keys (required)")
	iss := fs.String("iss", "", "issuer `URL`, as trusted in the config (required)")
	aud := fs.String("aud", "", "the exact service `URL` to call: public_base_url + /cds-services/{id} (required)")
	tenant := fs.String("tenant", "", "tenant claim, if the issuer is configured with tenants")
	lifetime := fs.Duration("lifetime", 5*time.Minute, "token lifetime")
	if _, err := parseFlags(fs, args); err != nil {
		return err
	}
	if *keyPath == "" || *iss == "" || *aud == "" {
		return errors.New("token: --key, --iss and --aud are required")
	}
	data, err := os.ReadFile(*keyPath)
	if err != nil {
		return fmt.Errorf("token: %w", err)
	}
	var jwk jose.JSONWebKey
	if err := json.Unmarshal(data, &jwk); err != nil {
		return fmt.Errorf("token: %s is not a JWK: %w", *keyPath, err)
	}
	key, ok := jwk.Key.(*ecdsa.PrivateKey)
	if !ok {
		return fmt.Errorf("token: %s is not an EC private key", *keyPath)
	}
	now := time.Now()
	claims := jwt.MapClaims{"iss": *iss, "sub": *iss, "aud": *aud, "iat": now.Unix(), "exp": now.Add(*lifetime).Unix(), "jti": uuid.NewString()}
	if *tenant != "" {
		claims["tenant"] = *tenant
	}
	tok := jwt.NewWithClaims(jwt.SigningMethodES384, claims)
	tok.Header["kid"] = jwk.KeyID
	s, err := tok.SignedString(key)
	if err != nil {
		return fmt.Errorf("token: %w", err)
	}
	fmt.Fprintln(stdout, s)
	return nil
}
