// Command stillwater sweep replays and scores clips over a grid of
// detection settings, in parallel over the cores, and writes a CSV table, a
// PNG chart and the best setting within a false-alarm budget.
package main

import (
	"bytes"
	"context"
	"encoding/csv"
	"flag"
	"fmt"
	"image/color"
	"io"
	"log/slog"
	"math"
	"os"
	"runtime"
	"sort"
	"strconv"
	"strings"
	"time"

	"golang.org/x/sync/errgroup"
	"gonum.org/v1/plot"
	"gonum.org/v1/plot/plotter"
	"gonum.org/v1/plot/vg"
	"gonum.org/v1/plot/vg/draw"
	"gonum.org/v1/plot/vg/vgimg"

	"stillwater/cmd/stillwater/internal/config"
	"stillwater/vision/synth"
)

// clipJob is one clip with its labels, ready to replay. Camera, when set,
// is the calibration to replay with (independent clips' labels carry the
// lens and camera position); otherwise it is built from Truth.
type clipJob struct {
	Name   string
	Clip   string
	Truth  synth.Truth
	Camera *config.CameraConfig
}

// replayScore replays one clip with cam's settings and scores it against
// its labels.
func replayScore(ctx context.Context, job clipJob, cam config.CameraConfig, rules scoreRules, log *slog.Logger) (clipScore, replayStats, error) {
	cam.Source = job.Clip
	var buf bytes.Buffer
	st, err := replayClip(ctx, cam, "stillwater", &buf, log)
	if err != nil {
		return clipScore{}, st, fmt.Errorf("replay %s: %w", job.Name, err)
	}
	lines, err := readReplay(&buf, job.Name)
	if err != nil {
		return clipScore{}, st, err
	}
	cs, err := scoreClip(job.Name, lines, job.Truth, rules)
	return cs, st, err
}

// sweepPoint is one setting of the grid. MinScore applies to meanvar
// only (0 keeps the camera's).
type sweepPoint struct {
	Threshold float64
	MinArea   float64
	Persist   time.Duration
	MinScore  float64
}

func (p sweepPoint) overrides() config.DetectOverrides {
	return config.DetectOverrides{Threshold: p.Threshold, MinArea: p.MinArea, Persist: p.Persist, MinScore: p.MinScore}
}

// sweepResult is a setting and its pooled score.
type sweepResult struct {
	Point sweepPoint
	Total scoreTotal
}

// sweep replays every job at every point, at most limit at a time.
func sweep(ctx context.Context, jobs []clipJob, points []sweepPoint, method string, rules scoreRules, limit int, log *slog.Logger) ([]sweepResult, error) {
	scores := make([][]clipScore, len(points))
	for i := range scores {
		scores[i] = make([]clipScore, len(jobs))
	}
	g, gctx := errgroup.WithContext(ctx)
	g.SetLimit(limit)
	for pi, p := range points {
		for ji, j := range jobs {
			g.Go(func() error {
				var cam config.CameraConfig
				if j.Camera != nil {
					cam = *j.Camera
				} else {
					c, err := cameraFromLabels(j.Truth, j.Clip)
					if err != nil {
						return fmt.Errorf("sweep %s: %w", j.Name, err)
					}
					cam = c
				}
				if method != "" {
					cam.Detect.Method = method
					cam.Detect = config.MergeDetect(config.DefaultDetect(), config.DetectConfig{Method: method, Persist: cam.Detect.Persist, UpdateEvery: cam.Detect.UpdateEvery, ClearAfter: cam.Detect.ClearAfter})
				}
				cam.Detect = p.overrides().Apply(cam.Detect)
				cs, _, err := replayScore(gctx, j, cam, rules, log)
				if err != nil {
					return err
				}
				scores[pi][ji] = cs
				return nil
			})
		}
	}
	if err := g.Wait(); err != nil {
		return nil, err
	}
	out := make([]sweepResult, len(points))
	for i, p := range points {
		out[i] = sweepResult{Point: p, Total: totalOf(scores[i])}
	}
	return out, nil
}

// grid is the cross product of the listed values; no scores keeps the
// camera's.
func grid(th, area []float64, persist []time.Duration, scores ...float64) []sweepPoint {
	if len(scores) == 0 {
		scores = []float64{0}
	}
	var out []sweepPoint
	for _, t := range th {
		for _, a := range area {
			for _, p := range persist {
				for _, sc := range scores {
					out = append(out, sweepPoint{Threshold: t, MinArea: a, Persist: p, MinScore: sc})
				}
			}
		}
	}
	return out
}

// best returns the setting that detects the most presences with at most
// budget false alarms per hour, then the smallest worst delay, then the
// smallest p95 position error; ok is false when none is within budget.
func best(rs []sweepResult, budget float64) (sweepResult, bool) {
	var cand []sweepResult
	for _, r := range rs {
		fph := r.Total.falsePerHour()
		if math.IsNaN(fph) {
			fph = 0
		}
		if fph <= budget {
			cand = append(cand, r)
		}
	}
	if len(cand) == 0 {
		return sweepResult{}, false
	}
	key := func(v float64) float64 {
		if math.IsNaN(v) {
			return math.Inf(1)
		}
		return v
	}
	sort.SliceStable(cand, func(i, j int) bool {
		a, b := cand[i].Total, cand[j].Total
		if a.Detected != b.Detected {
			return a.Detected > b.Detected
		}
		if da, db := key(maxOf(a.Delays)), key(maxOf(b.Delays)); da != db {
			return da < db
		}
		return key(quantile(a.Errors, 0.95)) < key(quantile(b.Errors, 0.95))
	})
	return cand[0], true
}

// writeSweepCSV writes one row per setting.
func writeSweepCSV(w io.Writer, rs []sweepResult) error {
	cw := csv.NewWriter(w)
	cw.Write([]string{"threshold", "min_area_m2", "persist_s", "min_score", "detected", "presences", "delay_median_s", "delay_max_s",
		"false_alarms", "false_per_hour", "err_median_m", "err_p95_m", "breaks"})
	f := func(v float64) string {
		if math.IsNaN(v) {
			return ""
		}
		return strconv.FormatFloat(v, 'f', 4, 64)
	}
	for _, r := range rs {
		t := r.Total
		cw.Write([]string{f(r.Point.Threshold), f(r.Point.MinArea), f(r.Point.Persist.Seconds()), f(r.Point.MinScore),
			strconv.Itoa(t.Detected), strconv.Itoa(t.Presences), f(quantile(t.Delays, 0.5)), f(maxOf(t.Delays)),
			strconv.Itoa(t.False), f(t.falsePerHour()), f(quantile(t.Errors, 0.5)), f(quantile(t.Errors, 0.95)), strconv.Itoa(t.Breaks)})
	}
	cw.Flush()
	return cw.Error()
}

// sweepChart draws, for each swept parameter, the mean over the other
// parameters of the worst first-alert delay (s) and of false alarms per
// hour against the parameter's values: one column per parameter.
func sweepChart(rs []sweepResult) (*vgimg.Canvas, error) {
	params := []struct {
		name string
		val  func(sweepPoint) float64
	}{
		{"threshold", func(p sweepPoint) float64 { return p.Threshold }},
		{"min area (m²)", func(p sweepPoint) float64 { return p.MinArea }},
		{"persist (s)", func(p sweepPoint) float64 { return p.Persist.Seconds() }},
		{"min score", func(p sweepPoint) float64 { return p.MinScore }},
	}
	metrics := []struct {
		name string
		val  func(scoreTotal) float64
	}{
		{"worst first-alert delay (s)", func(t scoreTotal) float64 { return maxOf(t.Delays) }},
		{"false alarms per hour", func(t scoreTotal) float64 { return t.falsePerHour() }},
	}
	plots := make([][]*plot.Plot, len(metrics))
	for mi, m := range metrics {
		plots[mi] = make([]*plot.Plot, len(params))
		for pi, par := range params {
			sum, n := map[float64]float64{}, map[float64]int{}
			for _, r := range rs {
				v := m.val(r.Total)
				if math.IsNaN(v) {
					continue
				}
				x := par.val(r.Point)
				sum[x] += v
				n[x]++
			}
			var xy plotter.XYs
			for x, s := range sum {
				xy = append(xy, plotter.XY{X: x, Y: s / float64(n[x])})
			}
			sort.Slice(xy, func(i, j int) bool { return xy[i].X < xy[j].X })
			p := plot.New()
			p.X.Label.Text = par.name
			p.Y.Label.Text = m.name
			p.Y.Min = 0
			if len(xy) > 0 {
				l, pts, err := plotter.NewLinePoints(xy)
				if err != nil {
					return nil, fmt.Errorf("sweep chart: %w", err)
				}
				l.Color = color.RGBA{B: 160, A: 255}
				pts.Color = l.Color
				p.Add(l, pts)
			}
			plots[mi][pi] = p
		}
	}
	c := vgimg.New(9*vg.Inch, 5*vg.Inch)
	dc := draw.New(c)
	tiles := draw.Tiles{Rows: len(metrics), Cols: len(params), PadX: vg.Millimeter * 4, PadY: vg.Millimeter * 4,
		PadTop: vg.Millimeter * 2, PadBottom: vg.Millimeter * 2, PadLeft: vg.Millimeter * 2, PadRight: vg.Millimeter * 2}
	canvases := plot.Align(plots, tiles, dc)
	for i := range plots {
		for j := range plots[i] {
			plots[i][j].Draw(canvases[i][j])
		}
	}
	return c, nil
}

// runSweep is "stillwater sweep".
func runSweep(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := flag.NewFlagSet("sweep", flag.ContinueOnError)
	fs.SetOutput(stderr)
	fs.Usage = func() {
		fmt.Fprintln(stderr, "usage: stillwater sweep [flags] clip.avi labels.json [clip.avi labels.json ...]")
		fs.PrintDefaults()
	}
	method := fs.String("method", "meanvar", "detection `method`: meanvar, mog2 or knn")
	ths := fs.String("threshold", "", "comma-separated `thresholds`: meanvar's core score (default 60), mog2's varThreshold (16), knn's dist2Threshold (400)")
	areas := fs.String("min-area", "", "comma-separated smallest `areas`, m²: meanvar's body at half contrast (default 0.03), mog2's and knn's blob (0.012)")
	scores := fs.String("min-score", "", "comma-separated least mean `scores` over a candidate (meanvar; default 50)")
	pers := fs.String("persist", "700ms", "comma-separated persistence `durations`")
	budget := fs.Float64("budget", 0, "false alarms per `hour` the best setting may raise")
	csvPath := fs.String("csv", "sweep.csv", "CSV `file` to write")
	pngPath := fs.String("png", "sweep.png", "PNG chart `file` to write (empty: none)")
	jobs := fs.Int("j", runtime.NumCPU(), "replays to run at once")
	if err := fs.Parse(args); err != nil {
		return errUsage
	}
	rest := fs.Args()
	if len(rest) == 0 || len(rest)%2 != 0 {
		fs.Usage()
		return fmt.Errorf("sweep: want pairs of clip and label file, got %d arguments: %w", len(rest), errUsage)
	}
	def := config.MergeDetect(config.DefaultDetect(), config.DetectConfig{Method: *method})
	if err := config.ValidateDetect("sweep", def); err != nil {
		return fmt.Errorf("sweep: -method: %w: %w", err, errUsage)
	}
	orDefault := func(s string, v float64) string {
		if s == "" {
			return fmt.Sprint(v)
		}
		return s
	}
	th, err := parseFloats("threshold", orDefault(*ths, def.Threshold))
	if err != nil {
		return err
	}
	ar, err := parseFloats("min-area", orDefault(*areas, def.MinArea))
	if err != nil {
		return err
	}
	sc := []float64{0}
	if *method == "meanvar" {
		if sc, err = parseFloats("min-score", orDefault(*scores, def.MinScore)); err != nil {
			return err
		}
	}
	pe, err := parseDurations("persist", *pers)
	if err != nil {
		return err
	}
	var cj []clipJob
	for i := 0; i < len(rest); i += 2 {
		t, err := readLabels(rest[i+1])
		if err != nil {
			return fmt.Errorf("sweep: %w", err)
		}
		cam, err := cameraForLabels(rest[i+1], rest[i])
		if err != nil {
			return fmt.Errorf("sweep: labels %s: %w", rest[i+1], err)
		}
		cj = append(cj, clipJob{Name: rest[i], Clip: rest[i], Truth: t, Camera: &cam})
	}
	if *jobs < 1 {
		*jobs = 1
	}
	log := slog.New(slog.NewTextHandler(stderr, &slog.HandlerOptions{Level: slog.LevelWarn}))
	start := time.Now()
	rs, err := sweep(ctx, cj, grid(th, ar, pe, sc...), *method, defaultScoreRules(), *jobs, log)
	if err != nil {
		return fmt.Errorf("sweep: %w", err)
	}
	fmt.Fprintf(stderr, "sweep: %d settings × %d clips in %.1f s\n", len(rs), len(cj), time.Since(start).Seconds())
	if err := writeFile(*csvPath, func(w io.Writer) error { return writeSweepCSV(w, rs) }); err != nil {
		return fmt.Errorf("sweep: %w", err)
	}
	if *pngPath != "" {
		c, err := sweepChart(rs)
		if err != nil {
			return err
		}
		if err := writeFile(*pngPath, func(w io.Writer) error {
			_, err := vgimg.PngCanvas{Canvas: c}.WriteTo(w)
			return err
		}); err != nil {
			return fmt.Errorf("sweep: %w", err)
		}
	}
	b, ok := best(rs, *budget)
	if !ok {
		return fmt.Errorf("sweep: no setting stays within %g false alarms per hour", *budget)
	}
	t := b.Total
	score := ""
	if b.Point.MinScore > 0 {
		score = fmt.Sprintf(", min_score %g", b.Point.MinScore)
	}
	fmt.Fprintf(stdout, "best within %g false alarms/h: method %s, threshold %g, min_area_m2 %g%s, persist %v: detected %d/%d, worst delay %s s, %d false, p95 error %s m\n",
		*budget, *method, b.Point.Threshold, b.Point.MinArea, score, b.Point.Persist, t.Detected, t.Presences, fmtNum(maxOf(t.Delays), 2), t.False, fmtNum(quantile(t.Errors, 0.95), 3))
	return nil
}

func writeFile(path string, fn func(io.Writer) error) error {
	f, err := os.Create(path)
	if err != nil {
		return err
	}
	if err := fn(f); err != nil {
		f.Close()
		return fmt.Errorf("write %s: %w", path, err)
	}
	return f.Close()
}

func parseFloats(flagName, s string) ([]float64, error) {
	var out []float64
	for _, f := range strings.Split(s, ",") {
		v, err := strconv.ParseFloat(strings.TrimSpace(f), 64)
		if err != nil || v <= 0 {
			return nil, fmt.Errorf("sweep: -%s %q: %q is not a positive number: %w", flagName, s, f, errUsage)
		}
		out = append(out, v)
	}
	return out, nil
}

func parseDurations(flagName, s string) ([]time.Duration, error) {
	var out []time.Duration
	for _, f := range strings.Split(s, ",") {
		v, err := time.ParseDuration(strings.TrimSpace(f))
		if err != nil || v <= 0 {
			return nil, fmt.Errorf("sweep: -%s %q: %q is not a positive duration such as 700ms: %w", flagName, s, f, errUsage)
		}
		out = append(out, v)
	}
	return out, nil
}
