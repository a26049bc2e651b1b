package auth

import (
	"context"
	"errors"
	"testing"

	"github.com/golang-jwt/jwt/v5"
)

// FuzzVerify: any Authorization header is refused with a *Failure or, for
// a genuine token, accepted; never a panic or another error.
func FuzzVerify(f *testing.F) {
	k := newTestKeys(f)
	v := newTestVerifier(f, k, nil)
	f.Add("Bearer " + sign(f, jwt.SigningMethodES384, k.ec, map[string]any{"kid": "k1", "typ": "JWT"}, goodClaims()))
	f.Add("bearer " + sign(f, jwt.SigningMethodES384, k.ec, map[string]any{"kid": "k1", "typ": "jwt", "crit": []string{"b64"}}, goodClaims()))
	f.Add(signRaw(f, k.ec, `{"alg":"ES384","typ":"JWT","kid":"k1","x":{"kid":"k2"},"kid":"k1"}`, rawClaims("")))
	f.Add("Bearer eyJhbGciOiJub25lIn0.e30.")
	f.Add("Bearer ..")
	f.Add("Basic abc")
	f.Fuzz(func(t *testing.T, header string) {
		_, err := v.Verify(context.Background(), header, testAud)
		var fl *Failure
		if err != nil && !errors.As(err, &fl) {
			t.Fatalf("error is not a Failure: %v", err)
		}
	})
}
