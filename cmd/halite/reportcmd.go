package main

import (
	"context"
	"errors"
	"fmt"
	"html/template"
	"io"
	"log/slog"
	"os"
	"strings"
	"text/tabwriter"
	"time"

	"github.com/halite-cds/halite/hooks/feedback"
)

// reportCmd prints, per service and rule over a period, the cards shown,
// accepted and overridden, the acceptance rate and the top override
// reasons; with --html it writes a self-contained page with a chart.
func reportCmd(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlags("report", "report [--config FILE] [--from DATE] [--to DATE] [--html FILE]", stderr)
	configPath := fs.String("config", "", "configuration `file` naming the store (or HALITE_CONFIG, HALITE_STORE_DSN)")
	fromFlag := fs.String("from", "", "first `day` (YYYY-MM-DD, UTC; default 30 days before --to)")
	toFlag := fs.String("to", "", "last `day` included (YYYY-MM-DD, UTC; default today)")
	htmlPath := fs.String("html", "", "also write an HTML page with a chart of outcomes to this `file`")
	if _, err := parseFlags(fs, args); err != nil {
		return err
	}
	cfg, err := loadConfig(*configPath, os.Getenv)
	if err != nil {
		return err
	}
	if err := cfg.Store.validate(true); err != nil {
		return err
	}
	to := time.Now().UTC().Truncate(24 * time.Hour)
	if *toFlag != "" {
		if to, err = time.Parse("2006-01-02", *toFlag); err != nil {
			return fmt.Errorf("--to: %q is not a day such as 2026-12-01", *toFlag)
		}
	}
	from := to.AddDate(0, 0, -30)
	if *fromFlag != "" {
		if from, err = time.Parse("2006-01-02", *fromFlag); err != nil {
			return fmt.Errorf("--from: %q is not a day such as 2026-11-01", *fromFlag)
		}
	}
	if from.After(to) {
		return errors.New("report: --from is after --to")
	}
	st, _, err := openStore(cfg.Store, slog.New(slog.NewTextHandler(io.Discard, nil)), true)
	if err != nil {
		return err
	}
	defer st.Close()
	rep, err := st.Report(ctx, from, to.Add(24*time.Hour))
	if err != nil {
		return err
	}
	writeReportText(stdout, rep)
	if *htmlPath != "" {
		f, err := os.Create(*htmlPath)
		if err != nil {
			return fmt.Errorf("report: %w", err)
		}
		if err := writeReportHTML(f, rep); err != nil {
			f.Close()
			return err
		}
		if err := f.Close(); err != nil {
			return fmt.Errorf("report: %w", err)
		}
	}
	return nil
}

func writeReportText(w io.Writer, rep feedback.Report) {
	tw := tabwriter.NewWriter(w, 0, 4, 2, ' ', 0)
	fmt.Fprintf(tw, "cards from %s to %s\n\n", rep.From.Format("2006-01-02"), rep.To.Add(-time.Hour).Format("2006-01-02"))
	fmt.Fprintln(tw, "service\trule\tshown\taccepted\toverridden\tacceptance\ttop override reasons")
	for _, r := range rep.Rules {
		fmt.Fprintf(tw, "%s\t%s\t%d\t%d\t%d\t%s\t%s\n", r.Service, r.Rule, r.Shown, r.Accepted, r.Overridden, rate(r), reasons(r))
	}
	if len(rep.Rules) == 0 {
		fmt.Fprintln(tw, "(no cards in the period)")
	}
	tw.Flush()
}

func rate(r feedback.RuleStats) string {
	if r.Accepted+r.Overridden == 0 {
		return "no feedback"
	}
	return fmt.Sprintf("%.0f%%", 100*r.AcceptanceRate())
}

func reasons(r feedback.RuleStats) string {
	var out []string
	for _, rc := range r.TopOverrideReasons {
		out = append(out, fmt.Sprintf("%s (%d)", rc.Code, rc.Count))
	}
	if len(out) == 0 {
		return "-"
	}
	return strings.Join(out, ", ")
}

// chartBar is one day's bar of the SVG chart.
type chartBar struct {
	X, W                                   float64
	Day                                    string
	ShownY, ShownH, AccY, AccH, OvrY, OvrH float64
	Shown, Accepted, Overridden            int64
}

var reportPage = template.Must(template.New("report").Funcs(template.FuncMap{"rate": rate, "reasons": reasons}).Parse(`<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>halite card outcomes</title>
<style>body{font-family:sans-serif;margin:2em}table{border-collapse:collapse}td,th{border:1px solid #999;padding:4px 8px;text-align:left}
.shown{fill:#c8c8c8}.acc{fill:#2b6cb0}.ovr{fill:#b7791f}</style></head><body>
<h1>Card outcomes, {{.From}} to {{.To}}</h1>
<svg id="outcomes-chart" role="img" aria-label="cards shown, accepted and overridden per day" width="{{.Width}}" height="{{.Height}}" viewBox="0 0 {{.Width}} {{.Height}}">
<title>Cards shown (grey), accepted (blue) and overridden (ochre) per day</title>
{{range .Bars}}<g class="day" data-day="{{.Day}}"><rect class="shown" x="{{.X}}" y="{{.ShownY}}" width="{{.W}}" height="{{.ShownH}}"><title>{{.Day}}: {{.Shown}} shown</title></rect>
<rect class="acc" x="{{.X}}" y="{{.AccY}}" width="{{.W}}" height="{{.AccH}}"><title>{{.Day}}: {{.Accepted}} accepted</title></rect>
<rect class="ovr" x="{{.X}}" y="{{.OvrY}}" width="{{.W}}" height="{{.OvrH}}"><title>{{.Day}}: {{.Overridden}} overridden</title></rect></g>
{{end}}</svg>
<table><tr><th>service</th><th>rule</th><th>shown</th><th>accepted</th><th>overridden</th><th>acceptance</th><th>top override reasons</th></tr>
{{range .Rules}}<tr><td>{{.Service}}</td><td>{{.Rule}}</td><td>{{.Shown}}</td><td>{{.Accepted}}</td><td>{{.Overridden}}</td><td>{{rate .}}</td><td>{{reasons .}}</td></tr>
{{else}}<tr><td colspan="7">no cards in the period</td></tr>{{end}}</table>
<p>Acceptance is accepted cards over cards with any feedback. Cards without feedback were shown and not acted on through the EHR.</p>
</body></html>
`))

func writeReportHTML(w io.Writer, rep feedback.Report) error {
	const height, barW, gap = 200.0, 16.0, 4.0
	var peak int64 = 1
	for _, d := range rep.Days {
		peak = max(peak, d.Shown)
	}
	scale := (height - 10) / float64(peak)
	var bars []chartBar
	for i, d := range rep.Days {
		x := float64(i)*(barW+gap) + gap
		b := chartBar{X: x, W: barW, Day: d.Day, Shown: d.Shown, Accepted: d.Accepted, Overridden: d.Overridden}
		b.ShownH = float64(d.Shown) * scale
		b.ShownY = height - b.ShownH
		b.AccH = float64(d.Accepted) * scale
		b.AccY = height - b.AccH
		b.OvrH = float64(d.Overridden) * scale
		b.OvrY = b.AccY - b.OvrH
		bars = append(bars, b)
	}
	width := max(200, float64(len(bars))*(barW+gap)+gap)
	err := reportPage.Execute(w, map[string]any{"From": rep.From.Format("2006-01-02"), "To": rep.To.Add(-time.Hour).Format("2006-01-02"),
		"Width": width, "Height": height, "Bars": bars, "Rules": rep.Rules})
	if err != nil {
		return fmt.Errorf("report html: %w", err)
	}
	return nil
}
