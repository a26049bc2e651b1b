package main

import (
	"bytes"
	"cmp"
	"context"
	"errors"
	"fmt"
	"html/template"
	"image/color"
	"io"
	"log/slog"
	"math"
	"os"
	"strconv"
	"strings"
	"text/tabwriter"
	"time"

	"gonum.org/v1/plot"
	"gonum.org/v1/plot/font"
	"gonum.org/v1/plot/plotter"
	"gonum.org/v1/plot/vg"
	"gonum.org/v1/plot/vg/draw"
	"gonum.org/v1/plot/vg/vgsvg"
)

// reportCmd prints the burden report over a period — cards per 100 calls
// by site, service, rule, indicator and ruleset revision, acceptance where
// a card offers something to accept, override reasons, time to feedback,
// findings held back, every day — and with --html writes it as a page with
// charts.
func reportCmd(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlags("report", "report [--config FILE] [--from DATE] [--to DATE] [--display-timezone ZONE] [--html FILE]", stderr)
	configPath := fs.String("config", "", "configuration `file` naming the store (or HALITE_CONFIG, HALITE_STORE_DSN)")
	fromFlag := fs.String("from", "", "first `day` (YYYY-MM-DD; default 30 days before --to)")
	toFlag := fs.String("to", "", "last `day` included (YYYY-MM-DD; default today)")
	zoneFlag := fs.String("display-timezone", "", "count days in this IANA `zone` (default: the configuration's display_timezone, else UTC)")
	htmlPath := fs.String("html", "", "also write the report as an HTML page with charts to this `file`")
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
	loc, err := displayZone(cmp.Or(*zoneFlag, cfg.DisplayTimezone))
	if err != nil {
		return fmt.Errorf("--display-timezone: %w", err)
	}
	now := time.Now().In(loc)
	to := time.Date(now.Year(), now.Month(), now.Day(), 0, 0, 0, 0, loc)
	if *toFlag != "" {
		if to, err = time.ParseInLocation("2006-01-02", *toFlag, loc); err != nil {
			return fmt.Errorf("--to: %q is not a day such as 2026-12-01", *toFlag)
		}
	}
	from := to.AddDate(0, 0, -30)
	if *fromFlag != "" {
		if from, err = time.ParseInLocation("2006-01-02", *fromFlag, loc); err != nil {
			return fmt.Errorf("--from: %q is not a day such as 2026-11-01", *fromFlag)
		}
	}
	if from.After(to) {
		return errors.New("report: --from is after --to")
	}
	if to.Sub(from) > 400*24*time.Hour {
		return errors.New("report: the period is longer than 400 days")
	}
	st, _, err := openStore(cfg.Store, slog.New(slog.NewTextHandler(io.Discard, nil)), true)
	if err != nil {
		return err
	}
	defer st.Close()
	rep, err := st.Report(ctx, from, to.AddDate(0, 0, 1))
	if err != nil {
		return err
	}
	b := readBurden(rep, from, to, loc)
	if err := writeBurdenText(stdout, b); err != nil {
		return err
	}
	if *htmlPath == "" {
		return nil
	}
	f, err := os.Create(*htmlPath)
	if err != nil {
		return fmt.Errorf("report: %w", err)
	}
	if err := writeBurdenHTML(f, b); err != nil {
		f.Close()
		return err
	}
	if err := f.Close(); err != nil {
		return fmt.Errorf("report: %w", err)
	}
	return nil
}

func writeBurdenText(w io.Writer, b burden) error {
	tw := tabwriter.NewWriter(w, 0, 4, 2, ' ', 0)
	fmt.Fprintf(tw, "burden report %s to %s (days in %s)\n", b.From, b.To, b.Zone)
	fmt.Fprintf(tw, "calls %d (failed %d), with cards %d, cards %d (%s per 100 calls), held back as repeats %d (%s per 100 calls)\n",
		b.Total.Calls, b.Total.Failed, b.Total.WithCards, b.Total.Cards, b.Total.Per100(), b.Total.Held, b.Total.HeldPer100())
	section := func(title, head string) { fmt.Fprintf(tw, "\n%s\n%s\n", title, head) }
	section("by site", "site\tcalls\tcards\tper 100 calls\tcritical\twarning\tinfo\theld back\tfailed calls")
	for _, v := range b.Sites {
		fmt.Fprintf(tw, "%s\t%d\t%d\t%s\t%d\t%d\t%d\t%d\t%d\n", v.Name, v.Calls, v.Cards, v.Per100(), v.Critical, v.Warning, v.Info, v.Held, v.Failed)
	}
	section("by service", "service\tcalls\tcards\tper 100 calls\theld back\tacceptance")
	for _, v := range b.Services {
		fmt.Fprintf(tw, "%s\t%d\t%d\t%s\t%d\t%s\n", v.Name, v.Calls, v.Cards, v.Per100(), v.Held, v.Acceptance())
	}
	section("by indicator", "indicator\tcards\tper 100 calls\theld back")
	for _, v := range b.Indicators {
		fmt.Fprintf(tw, "%s\t%d\t%s\t%d\n", v.Name, v.Cards, v.Per100(), v.Held)
	}
	section("by rule", "service\trule\tcards\tper 100 calls\theld back\tacceptance\toverridden\ttime to feedback (median)\ttop override reasons")
	for _, r := range b.Rules {
		fmt.Fprintf(tw, "%s\t%s\t%d\t%s\t%d\t%s\t%d\t%s\t%s\n", r.Service, r.Rule, r.Cards, r.Per100(), r.Held, r.Acceptance(), r.Overridden,
			r.Median, cmp.Or(r.Reasons, "-"))
	}
	if len(b.Rules) == 0 {
		fmt.Fprintln(tw, "(no cards in the period)")
	}
	section("by ruleset revision (before and after)", "revision\tfirst day\tlast day\tcalls\tcards\tper 100 calls\theld back per 100\tacceptance\ttime to feedback (median)")
	for _, r := range b.Revisions {
		fmt.Fprintf(tw, "%s\t%s\t%s\t%d\t%d\t%s\t%s\t%s\t%s\n", r.Name, r.First, r.Last, r.Calls, r.Cards, r.Per100(), r.HeldPer100(), r.Acceptance(), r.Median)
	}
	section("override reasons", "reason\tcards\tshare")
	for _, c := range b.Reasons {
		fmt.Fprintf(tw, "%s\t%d\t%s\n", c.Label, c.Count, c.Share)
	}
	section("held back as repeats", "why\tfindings\tshare")
	for _, c := range b.Held {
		fmt.Fprintf(tw, "%s\t%d\t%s\n", c.Label, c.Count, c.Share)
	}
	section("by day", "day\tcalls\tcards\taccepted\toverridden\tno feedback\theld back")
	for _, d := range b.Days {
		fmt.Fprintf(tw, "%s\t%d\t%d\t%d\t%d\t%d\t%d\n", d.Day, d.Calls, d.Shown(), d.Accepted, d.Overridden, d.Pending, d.Held)
	}
	fmt.Fprintln(tw, "\nAcceptance counts only cards that offered a suggestion: accepted over accepted and overridden (n/a when none offered one).")
	if b.EarlyFeedback > 0 {
		fmt.Fprintf(tw, "%d feedback entries dated before their card (EHR clock) are left out of the times to feedback.\n", b.EarlyFeedback)
	}
	return tw.Flush()
}

// Four colours of Okabe and Ito's colour-blind-safe palette (Okabe M, Ito
// K, "Color Universal Design", 2002 web publication; hex values from
// memory). Every series also has its legend entry and its column in the
// day table, so nothing is told by colour alone.
var (
	colourBlue       = color.RGBA{0x00, 0x72, 0xB2, 0xff}
	colourVermillion = color.RGBA{0xD5, 0x5E, 0x00, 0xff}
	colourGrey       = color.RGBA{0x99, 0x99, 0x99, 0xff}
	colourSky        = color.RGBA{0x56, 0xB4, 0xE9, 0xff}
)

// dayTicks label the days of the x axis, at most about 12 of them.
func dayTicks(days []dayRow) plot.ConstantTicks {
	step := max(1, (len(days)+11)/12)
	var ticks []plot.Tick
	for i, d := range days {
		t := plot.Tick{Value: float64(i)}
		if i%step == 0 {
			day, _ := time.Parse("2006-01-02", d.Day)
			t.Label = day.Format("2 Jan")
		}
		ticks = append(ticks, t)
	}
	return ticks
}

// newChart is a plot with its text in a sans-serif face (the default serif
// face is harder to read at small sizes).
func newChart(title, xLabel, yLabel string) *plot.Plot {
	p := plot.New()
	p.Title.Text, p.X.Label.Text, p.Y.Label.Text = title, xLabel, yLabel
	for _, f := range []*font.Font{&p.Title.TextStyle.Font, &p.X.Label.TextStyle.Font, &p.Y.Label.TextStyle.Font,
		&p.X.Tick.Label.Font, &p.Y.Tick.Label.Font, &p.Legend.TextStyle.Font} {
		f.Variant = "Sans"
	}
	p.Title.TextStyle.Font.Size = vg.Points(14)
	p.Legend.TextStyle.Font.Size = vg.Points(11)
	p.Legend.Padding = vg.Points(3)
	return p
}

// countTicks marks whole numbers on a count axis, at most about six.
func countTicks(lo, hi float64) []plot.Tick {
	step := 1.0
	for _, s := range []float64{1, 2, 5, 10, 20, 50, 100, 200, 500, 1000, 2000, 5000, 10000} {
		step = s
		if (hi-lo)/s <= 6 {
			break
		}
	}
	var ticks []plot.Tick
	for v := math.Ceil(lo/step) * step; v <= hi; v += step {
		ticks = append(ticks, plot.Tick{Value: v, Label: strconv.FormatFloat(v, 'f', -1, 64)})
	}
	return ticks
}

// svgOf draws p as an SVG element for inline use.
func svgOf(p *plot.Plot, w, h vg.Length) (template.HTML, error) {
	c := vgsvg.New(w, h)
	p.Draw(draw.New(c))
	var buf bytes.Buffer
	if _, err := c.WriteTo(&buf); err != nil {
		return "", fmt.Errorf("report chart: %w", err)
	}
	s := buf.String()
	if i := strings.Index(s, "<svg"); i >= 0 {
		s = s[i:] // no XML declaration inside HTML
	}
	return template.HTML(s), nil
}

// outcomeChart is a stacked bar per day: accepted, overridden, no feedback,
// and held back on top.
func outcomeChart(b burden) (template.HTML, error) {
	p := newChart("Cards per day by outcome", "day ("+b.Zone+")", "cards")
	n := len(b.Days)
	series := []struct {
		name string
		c    color.Color
		v    func(dayRow) int64
	}{
		{"accepted", colourBlue, func(d dayRow) int64 { return d.Accepted }},
		{"overridden", colourVermillion, func(d dayRow) int64 { return d.Overridden }},
		{"no feedback", colourGrey, func(d dayRow) int64 { return d.Pending }},
		{"held back as repeats", colourSky, func(d dayRow) int64 { return d.Held }},
	}
	const width, height = 760, 320
	barW := vg.Points(max(2, min(28, 0.7*(width-80)/float64(n))))
	var below *plotter.BarChart
	var peak int64
	for _, d := range b.Days {
		peak = max(peak, d.Shown()+d.Held)
	}
	for _, s := range series {
		vals := make(plotter.Values, n)
		for i, d := range b.Days {
			vals[i] = float64(s.v(d))
		}
		bars, err := plotter.NewBarChart(vals, barW)
		if err != nil {
			return "", fmt.Errorf("report chart: %w", err)
		}
		bars.Color, bars.LineStyle.Width = s.c, 0
		if below != nil {
			bars.StackOn(below)
		}
		below = bars
		p.Add(bars)
		p.Legend.Add(s.name, bars)
	}
	p.Legend.Top, p.Legend.Left = true, true
	p.X.Tick.Marker = dayTicks(b.Days)
	p.X.Min, p.X.Max = -0.6, float64(n)-0.4
	// Room above the tallest bar for the legend.
	p.Y.Min, p.Y.Max = 0, max(4, float64(peak)*1.45)
	p.Y.Tick.Marker = plot.TickerFunc(countTicks)
	p.Add(plotter.NewGrid())
	return svgOf(p, width, height)
}

// rateChart is cards per 100 calls per day, with no point on a day
// without calls.
func rateChart(b burden) (template.HTML, error) {
	p := newChart("Cards per 100 calls per day", "day ("+b.Zone+")", "cards per 100 calls")
	// A line joins consecutive days only: a day without calls has no point
	// and breaks the line.
	var runs []plotter.XYs
	peak := 1.0
	for i, d := range b.Days {
		if d.Calls == 0 {
			continue
		}
		v := 100 * float64(d.Shown()) / float64(d.Calls)
		if len(runs) == 0 || runs[len(runs)-1][len(runs[len(runs)-1])-1].X != float64(i-1) {
			runs = append(runs, nil)
		}
		runs[len(runs)-1] = append(runs[len(runs)-1], plotter.XY{X: float64(i), Y: v})
		peak = max(peak, v)
	}
	for i, run := range runs {
		line, points, err := plotter.NewLinePoints(run)
		if err != nil {
			return "", fmt.Errorf("report chart: %w", err)
		}
		line.Color, points.Color, points.Shape = colourBlue, colourBlue, draw.CircleGlyph{}
		p.Add(line, points)
		if i == 0 {
			p.Legend.Add("cards per 100 calls (no point: no calls that day)", line, points)
			p.Legend.Top, p.Legend.Left = true, true
		}
	}
	p.X.Tick.Marker = dayTicks(b.Days)
	p.X.Min, p.X.Max = -0.6, float64(len(b.Days))-0.4
	p.Y.Min, p.Y.Max = 0, peak*1.35
	p.Add(plotter.NewGrid())
	return svgOf(p, 760, 260)
}

var burdenPage = template.Must(template.New("report").Parse(`<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>halite burden report {{.B.From}} to {{.B.To}}</title>
<meta http-equiv="Content-Security-Policy" content="default-src 'none'; style-src 'unsafe-inline'">
<style>body{font-family:sans-serif;margin:2em;max-width:70em;color:#111}table{border-collapse:collapse;margin:.5em 0 1.5em}
td,th{border:1px solid #999;padding:3px 8px;text-align:left}td.n{text-align:right}figure{margin:1em 0}
.summary{font-size:1.15em}caption{text-align:left;font-weight:bold;padding:.3em 0}</style></head><body>
<h1>Card burden, {{.B.From}} to {{.B.To}}</h1>
<p class="summary" id="summary">{{.B.Total.Calls}} calls ({{.B.Total.Failed}} failed), {{.B.Total.Cards}} cards: <strong>{{.B.Total.Per100}} cards per 100 calls</strong>;
{{.B.Total.Held}} findings held back as repeats ({{.B.Total.HeldPer100}} per 100 calls). Days are counted in {{.B.Zone}}.</p>
<figure id="outcomes-chart" role="img" aria-label="Cards per day by outcome: accepted, overridden, no feedback, held back as repeats; the table by day below gives the figures.">{{.Outcomes}}</figure>
<figure id="rate-chart" role="img" aria-label="Cards per 100 calls per day.">{{.Rates}}</figure>
<table id="sites"><caption>By site (most cards first)</caption><tr><th>site</th><th>calls</th><th>cards</th><th>per 100 calls</th><th>critical</th><th>warning</th><th>info</th><th>held back</th><th>failed calls</th></tr>
{{range .B.Sites}}<tr><td>{{.Name}}</td><td class="n">{{.Calls}}</td><td class="n">{{.Cards}}</td><td class="n">{{.Per100}}</td><td class="n">{{.Critical}}</td><td class="n">{{.Warning}}</td><td class="n">{{.Info}}</td><td class="n">{{.Held}}</td><td class="n">{{.Failed}}</td></tr>
{{else}}<tr><td colspan="9">no calls in the period</td></tr>{{end}}</table>
<table id="services"><caption>By service</caption><tr><th>service</th><th>calls</th><th>cards</th><th>per 100 calls</th><th>held back</th><th>acceptance</th></tr>
{{range .B.Services}}<tr><td>{{.Name}}</td><td class="n">{{.Calls}}</td><td class="n">{{.Cards}}</td><td class="n">{{.Per100}}</td><td class="n">{{.Held}}</td><td class="n">{{.Acceptance}}</td></tr>
{{end}}</table>
<table id="indicators"><caption>By indicator (per 100 calls to all services)</caption><tr><th>indicator</th><th>cards</th><th>per 100 calls</th><th>held back</th></tr>
{{range .B.Indicators}}<tr><td>{{.Name}}</td><td class="n">{{.Cards}}</td><td class="n">{{.Per100}}</td><td class="n">{{.Held}}</td></tr>
{{end}}</table>
<table id="rules"><caption>By rule (per 100 calls to its service)</caption><tr><th>service</th><th>rule</th><th>cards</th><th>per 100 calls</th><th>held back</th><th>acceptance</th><th>overridden</th><th>time to feedback (median)</th><th>top override reasons</th></tr>
{{range .B.Rules}}<tr><td>{{.Service}}</td><td>{{.Rule}}</td><td class="n">{{.Cards}}</td><td class="n">{{.Per100}}</td><td class="n">{{.Held}}</td><td class="n">{{.Acceptance}}</td><td class="n">{{.Overridden}}</td><td class="n">{{.Median}}</td><td>{{.Reasons}}</td></tr>
{{else}}<tr><td colspan="9">no cards in the period</td></tr>{{end}}</table>
<table id="revisions"><caption>By ruleset revision (before and after a change)</caption><tr><th>revision</th><th>first day</th><th>last day</th><th>calls</th><th>cards</th><th>per 100 calls</th><th>held back per 100</th><th>acceptance</th><th>time to feedback (median)</th></tr>
{{range .B.Revisions}}<tr><td>{{.Name}}</td><td>{{.First}}</td><td>{{.Last}}</td><td class="n">{{.Calls}}</td><td class="n">{{.Cards}}</td><td class="n">{{.Per100}}</td><td class="n">{{.HeldPer100}}</td><td class="n">{{.Acceptance}}</td><td class="n">{{.Median}}</td></tr>
{{end}}</table>
<table id="reasons"><caption>Override reasons</caption><tr><th>reason</th><th>cards</th><th>share</th></tr>
{{range .B.Reasons}}<tr><td>{{.Label}}</td><td class="n">{{.Count}}</td><td class="n">{{.Share}}</td></tr>
{{else}}<tr><td colspan="3">no override with a reason</td></tr>{{end}}</table>
<table id="held"><caption>Held back as repeats</caption><tr><th>why</th><th>findings</th><th>share</th></tr>
{{range .B.Held}}<tr><td>{{.Label}}</td><td class="n">{{.Count}}</td><td class="n">{{.Share}}</td></tr>
{{else}}<tr><td colspan="3">none held back</td></tr>{{end}}</table>
<details><summary>By day</summary><table id="days"><tr><th>day</th><th>calls</th><th>cards</th><th>accepted</th><th>overridden</th><th>no feedback</th><th>held back</th></tr>
{{range .B.Days}}<tr><td>{{.Day}}</td><td class="n">{{.Calls}}</td><td class="n">{{.Shown}}</td><td class="n">{{.Accepted}}</td><td class="n">{{.Overridden}}</td><td class="n">{{.Pending}}</td><td class="n">{{.Held}}</td></tr>
{{end}}</table></details>
<p>Acceptance counts only cards that offered a suggestion: accepted over accepted and overridden ("n/a" when none offered one).
Cards without feedback were shown and not acted on through the EHR. A finding held back was not shown: the same finding had been shown
(or overridden with a reason) and was no worse. The report names no patient.{{if .B.EarlyFeedback}} {{.B.EarlyFeedback}} feedback entries dated
before their card (EHR clock) are left out of the times to feedback.{{end}}</p>
</body></html>
`))

func writeBurdenHTML(w io.Writer, b burden) error {
	outcomes, err := outcomeChart(b)
	if err != nil {
		return err
	}
	rates, err := rateChart(b)
	if err != nil {
		return err
	}
	if err := burdenPage.Execute(w, map[string]any{"B": b, "Outcomes": outcomes, "Rates": rates}); err != nil {
		return fmt.Errorf("report html: %w", err)
	}
	return nil
}
