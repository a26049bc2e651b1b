package main

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"regexp"
	"runtime"
	"runtime/debug"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/halite-cds/halite/hooks"
)

// corpusSize is the number of generated patients (issue 18: at least 200).
const corpusSize = 200

// corpusCard is the part of a card the corpus test reads.
type corpusCard struct {
	Summary   string `json:"summary"`
	Detail    string `json:"detail"`
	Indicator string `json:"indicator"`
	Extension struct {
		Halite struct {
			Rule       string `json:"rule"`
			Ingredient string `json:"ingredient"`
		} `json:"halite"`
	} `json:"extension"`
}

// corpusRun is one eval run's result.
type corpusRun struct {
	stdout, stderr string
	err            error
	panicked       string
}

// evalCorpus runs halite eval with args, recovering a panic into the result.
func evalCorpus(ctx context.Context, args []string) (r corpusRun) {
	var out, errOut bytes.Buffer
	defer func() {
		if p := recover(); p != nil {
			r.panicked = fmt.Sprintf("%v\n%s", p, debug.Stack())
		}
		r.stdout, r.stderr = out.String(), errOut.String()
	}()
	r.err = run(ctx, append([]string{"eval"}, args...), &out, &errOut)
	return r
}

// floatNoise matches a number printed with floating-point noise.
var floatNoise = regexp.MustCompile(`\d\.\d{5,}`)

// TestSyntheticCorpus runs every bundle of the synthetic corpus through eval
// for order-sign (sodium-infusion-check, sodium-drug-risk) and patient-view
// (sodium-chart-review): no panic, every resource linked to the patient, the
// drug-risk card on each seeded patient and none on the others, and, on a
// sample, a reason for every result not used (issue 18, "Done when").
func TestSyntheticCorpus(t *testing.T) {
	at, err := time.Parse(time.RFC3339, scenarioAt)
	if err != nil {
		t.Fatal(err)
	}
	patients, err := generateCorpus(corpusSize, 18, at)
	if err != nil {
		t.Fatal(err)
	}
	again, err := generateCorpus(corpusSize, 18, at)
	if err != nil {
		t.Fatal(err)
	}
	for i := range patients {
		if !bytes.Equal(patients[i].data, again[i].data) {
			t.Fatalf("generator is not deterministic: patient %d differs between two runs", i)
		}
	}
	dir := t.TempDir()
	paths := make([]string, len(patients))
	seeded := 0
	for i, p := range patients {
		paths[i] = filepath.Join(dir, fmt.Sprintf("patient-%03d.json", i))
		if err := os.WriteFile(paths[i], p.data, 0o644); err != nil {
			t.Fatal(err)
		}
		if p.seeded {
			seeded++
		}
	}
	if seeded < corpusSize/10 {
		t.Fatalf("%d seeded patients, want %d", seeded, corpusSize/10)
	}

	// Every resource that names a patient names this bundle's Patient,
	// whichever reference form it uses.
	drugRisk, _ := hooks.NewRegistry(nil, nil).Lookup("sodium-drug-risk")
	for i, p := range patients {
		b, err := readBundle(paths[i])
		if err != nil {
			t.Fatalf("patient %d: %v", i, err)
		}
		req, err := hooks.BuildRequest(b, drugRisk, hooks.RequestOptions{Hook: hooks.HookOrderSign, UserID: "Practitioner/cli-user"})
		if err != nil {
			t.Fatalf("patient %d: %v", i, err)
		}
		var c struct {
			PatientID string `json:"patientId"`
		}
		if err := json.Unmarshal(req.Context, &c); err != nil {
			t.Fatal(err)
		}
		if linked, other := hooks.PatientLinks(b, c.PatientID); linked != p.named || other != 0 {
			t.Errorf("patient %d: %d resources linked and %d not, want all %d linked", i, linked, other, p.named)
		}
	}

	type job struct {
		i    int
		hook string
		text bool
	}
	var jobs []job
	for i := range patients {
		for _, hook := range []string{hooks.HookOrderSign, hooks.HookPatientView} {
			jobs = append(jobs, job{i: i, hook: hook})
			if (i%20 == 0 || i%40 == 3) && !testing.Short() {
				jobs = append(jobs, job{i: i, hook: hook, text: true})
			}
		}
	}
	results := make([]corpusRun, len(jobs))
	ctx := t.Context()
	work := make(chan int)
	var wg sync.WaitGroup
	for range runtime.GOMAXPROCS(0) {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for k := range work {
				j := jobs[k]
				args := []string{"--hook", j.hook, "--at", scenarioAt}
				if !j.text {
					args = append(args, "--json")
				}
				results[k] = evalCorpus(ctx, append(args, paths[j.i]))
			}
		}()
	}
	for k := range jobs {
		work <- k
	}
	close(work)
	wg.Wait()

	counts := map[string]int{}
	for k, j := range jobs {
		p, r := patients[j.i], results[k]
		name := fmt.Sprintf("patient %d (%s, %s)", j.i, filepath.Base(paths[j.i]), j.hook)
		if j.text {
			name += " report"
		}
		if r.panicked != "" {
			t.Errorf("%s: panic: %s", name, r.panicked)
			continue
		}
		var exit *exitError
		if r.err != nil && !(errors.As(r.err, &exit) && (exit.code == exitWarning || exit.code == exitCritical)) {
			t.Errorf("%s: eval: %v\nstderr: %s", name, r.err, r.stderr)
			continue
		}
		if strings.Contains(r.stderr, "WARNING") || strings.Contains(r.stdout, "WARNING: none of") {
			t.Errorf("%s: warns about unlinked resources although every resource is the patient's:\n%s%s", name, r.stderr, r.stdout)
		}
		if j.text {
			checkCorpusReport(t, name, p, j.hook, r.stdout)
			continue
		}
		var resp map[string]struct {
			Cards []corpusCard `json:"cards"`
		}
		if err := json.Unmarshal([]byte(r.stdout), &resp); err != nil {
			t.Errorf("%s: response is not JSON: %v\n%s", name, err, r.stdout)
			continue
		}
		want := []string{"sodium-infusion-check", "sodium-drug-risk"}
		if j.hook == hooks.HookPatientView {
			want = []string{"sodium-chart-review"}
		}
		if len(resp) != len(want) {
			t.Errorf("%s: services %v, want %v", name, keysOf(resp), want)
		}
		for _, svc := range want {
			if _, ok := resp[svc]; !ok {
				t.Errorf("%s: no response from %s", name, svc)
			}
		}
		for svc, sr := range resp {
			for _, c := range sr.Cards {
				counts[svc+" "+c.Extension.Halite.Rule]++
				if m := floatNoise.FindString(c.Summary + "\n" + c.Detail); m != "" {
					t.Errorf("%s: %s card %q shows %s, a value with floating-point noise", name, svc, c.Summary, m)
				}
			}
		}
		switch j.hook {
		case hooks.HookOrderSign:
			cards := resp["sodium-drug-risk"].Cards
			if !p.seeded {
				for _, c := range cards {
					t.Errorf("%s: sodium-drug-risk card on a patient with sodium %g and no risk drug: %q (rule %s)",
						name, p.latestSodium, c.Summary, c.Extension.Halite.Rule)
				}
				continue
			}
			found := false
			wantNa := fmt.Sprintf("sodium is %s mmol/L", strconv.FormatFloat(p.latestSodium, 'f', -1, 64))
			for _, c := range cards {
				h := c.Extension.Halite
				if h.Rule != "drug-hyponatremia-risk" || h.Ingredient != p.drug {
					continue
				}
				found = true
				if !strings.Contains(c.Summary, "(new start)") || !strings.Contains(c.Summary, wantNa) {
					t.Errorf("%s: card summary %q, want a new start and %q", name, c.Summary, wantNa)
				}
				if p.conflicts > 0 && !strings.Contains(c.Detail, "Results taken at the same time differ") {
					t.Errorf("%s: the latest sodium has a differing result at its time; the card does not say so:\n%s", name, c.Detail)
				}
				if c.Indicator != "warning" && c.Indicator != "critical" {
					t.Errorf("%s: card indicator %q at sodium %g, want warning or critical", name, c.Indicator, p.latestSodium)
				}
			}
			if !found {
				t.Errorf("%s: seeded with sodium %g and a draft %s, no drug-hyponatremia-risk card for %s; cards: %s",
					name, p.latestSodium, p.drug, p.drug, summaries(cards))
			}
		case hooks.HookPatientView:
			cards := resp["sodium-chart-review"].Cards
			profound := false
			for _, c := range cards {
				if c.Extension.Halite.Rule == "sodium-profound-or-falling" {
					profound = true
				}
			}
			if p.seeded && p.latestSodium < 125 && !profound {
				t.Errorf("%s: sodium %g, no sodium-profound-or-falling card; cards: %s", name, p.latestSodium, summaries(cards))
			}
			if !p.seeded && len(cards) > 0 {
				t.Errorf("%s: chart review cards on a patient with stable normal sodium %g: %s", name, p.latestSodium, summaries(cards))
			}
		}
	}
	t.Logf("%d patients (%d seeded), %d eval runs; cards by service and rule: %v", len(patients), seeded, len(jobs), counts)
}

// reportLine is a line of eval's data section that names something not used.
var reportLine = regexp.MustCompile(`^(rejected|missing)\s+(\S[^:]*): (\S.*)$`)

// checkCorpusReport checks eval's text report for p: every rejected or
// missing line states a reason, and on patient-view (whose service reads
// every analyte the corpus holds) each generated Observation is either a
// result or a rejected line, so none is dropped without a reason.
func checkCorpusReport(t *testing.T, name string, p corpusPatient, hook, report string) {
	t.Helper()
	if !strings.Contains(report, "-- data") {
		t.Errorf("%s: report without a data section:\n%s", name, report)
		return
	}
	results := map[string]int{}
	rejected := map[string]int{}
	draft := "1 draft"
	if hook == hooks.HookPatientView {
		draft = "0 draft"
	}
	for _, section := range strings.Split(report, "\n== ")[1:] {
		svc, _, _ := strings.Cut(section, "\n")
		_, data, _ := strings.Cut(section, "-- data\n")
		for _, line := range strings.Split(strings.TrimRight(data, "\n"), "\n") {
			word, _, _ := strings.Cut(line, " ")
			switch word {
			case "rejected", "missing":
				m := reportLine.FindStringSubmatch(line)
				if m == nil || strings.TrimSpace(m[3]) == "" {
					t.Errorf("%s: %s: line without a stated reason: %q", name, svc, line)
					continue
				}
				if a, ok := p.obs[m[2]]; ok && m[1] == "rejected" && hook == hooks.HookPatientView {
					rejected[a]++
				}
			case "medications":
				if want := fmt.Sprintf("medications  %d active, %s", p.active, draft); svc != "sodium-infusion-check" && line != want {
					t.Errorf("%s: %s: %q, want %q", name, svc, line, want)
				}
			}
			if hook != hooks.HookPatientView {
				continue
			}
			var n int
			if _, err := fmt.Sscanf(line[len(word):], "%d results", &n); err == nil {
				results[word] = n
			}
		}
	}
	if hook != hooks.HookPatientView {
		return
	}
	// Each differing result at one time is named in a note, with the value
	// that counts (rules.SameTimePolicy).
	if got := strings.Count(report, "sodium results taken at the same time"); got != p.conflicts {
		t.Errorf("%s: %d same-time sodium conflicts generated, the report names %d:\n%s", name, p.conflicts, got, report)
	}
	generated := map[string]int{}
	for _, a := range p.obs {
		generated[a]++
	}
	for a, n := range generated {
		if got := results[a] + rejected[a]; got != n {
			t.Errorf("%s: %d %s Observations in the bundle, the report accounts for %d (%d results, %d rejected):\n%s",
				name, n, a, got, results[a], rejected[a], report)
		}
	}
}

func keysOf[V any](m map[string]V) []string {
	var out []string
	for k := range m {
		out = append(out, k)
	}
	return out
}

func summaries(cards []corpusCard) string {
	var out []string
	for _, c := range cards {
		out = append(out, fmt.Sprintf("%q (%s)", c.Summary, c.Extension.Halite.Rule))
	}
	return "[" + strings.Join(out, ", ") + "]"
}
