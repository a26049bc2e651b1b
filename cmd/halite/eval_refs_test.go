package main

import (
	"bytes"
	"context"
	"errors"
	"io"
	"os"
	"path/filepath"
	"strings"
	"testing"
)

// TestEvalURNTransactionBundle evaluates a transaction Bundle with
// urn:uuid references: the sodium results are used and the card appears.
func TestEvalURNTransactionBundle(t *testing.T) {
	file := filepath.Join("..", "..", "testdata", "bundles", "transaction-urn-uuid.json")
	var out bytes.Buffer
	err := run(context.Background(), []string{"eval", "--hook", "order-sign", "--at", scenarioAt, file}, &out, io.Discard)
	var exit *exitError
	if !errors.As(err, &exit) || exit.code != exitWarning {
		t.Fatalf("exit %v, want the warning status", err)
	}
	report := out.String()
	for _, want := range []string{"prefetch     sodium: prefetched, 4 resources", "sodium       4 results, latest 116 mmol/L",
		"WARNING     Projected 24-h sodium rise 16.1 mmol/L", "medications  0 active, 1 draft"} {
		if !strings.Contains(report, want) {
			t.Errorf("report lacks %q:\n%s", want, report)
		}
	}
	if strings.Contains(report, "not linked") || strings.Contains(report, "subject is not the patient") {
		t.Errorf("report warns although every resource is the patient's:\n%s", report)
	}
}

// TestEvalWarnsWhenNothingLinked evaluates the same bundle with every
// reference to the patient pointing at another one.
func TestEvalWarnsWhenNothingLinked(t *testing.T) {
	data, err := os.ReadFile(filepath.Join("..", "..", "testdata", "bundles", "transaction-urn-uuid.json"))
	if err != nil {
		t.Fatal(err)
	}
	other := strings.ReplaceAll(string(data), `"reference": "urn:uuid:881de823-fcc9-55a3-8309-131c209c38a0"`,
		`"reference": "urn:uuid:00000000-0000-4000-8000-00000000beef"`)
	other = strings.ReplaceAll(other, `"reference": "Patient/881de823-fcc9-55a3-8309-131c209c38a0"`,
		`"reference": "Patient/someone-else"`)
	file := filepath.Join(t.TempDir(), "other.json")
	if err := os.WriteFile(file, []byte(other), 0o644); err != nil {
		t.Fatal(err)
	}
	var out, stderr bytes.Buffer
	if err := run(context.Background(), []string{"eval", "--hook", "order-sign", "--at", scenarioAt, file}, &out, io.Discard); err != nil {
		t.Fatalf("eval: %v (no card expected)", err)
	}
	want := "WARNING: none of the 8 resources that name a patient is linked to the patient in context"
	if !strings.HasPrefix(out.String(), want) {
		t.Errorf("report does not start with the warning:\n%s", out.String())
	}
	out.Reset()
	if err := run(context.Background(), []string{"eval", "--hook", "order-sign", "--at", scenarioAt, "--json", file}, &out, &stderr); err != nil {
		t.Fatal(err)
	}
	if !strings.Contains(stderr.String(), want) || strings.Contains(out.String(), "WARNING") {
		t.Errorf("--json: stderr %q, stdout %s; want the warning on stderr only", stderr.String(), out.String())
	}
}
