package tuning

import (
	"bytes"
	"context"
	"encoding/csv"
	"fmt"
	"image/color"
	"io"
	"log/slog"
	"math"
	"sort"
	"strconv"
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

// ClipJob is one clip with its labels, ready to replay. Camera, when set,
// is the calibration to replay with (independent clips' labels carry the
// lens and camera position); otherwise it is built from Truth.
type ClipJob struct {
	Name   string
	Clip   string
	Truth  synth.Truth
	Camera *config.CameraConfig
}

// ReplayScore replays one clip with cam's settings and scores it against
// its labels.
func ReplayScore(ctx context.Context, job ClipJob, cam config.CameraConfig, rules scoreRules, log *slog.Logger) (ClipScore, replayStats, error) {
	cam.Source = job.Clip
	var buf bytes.Buffer
	st, err := ReplayClip(ctx, cam, "stillwater", &buf, log)
	if err != nil {
		return ClipScore{}, st, fmt.Errorf("replay %s: %w", job.Name, err)
	}
	lines, err := ReadReplay(&buf, job.Name)
	if err != nil {
		return ClipScore{}, st, err
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

// Sweep replays every job at every point, at most limit at a time.
func Sweep(ctx context.Context, jobs []ClipJob, points []sweepPoint, method string, rules scoreRules, limit int, log *slog.Logger) ([]sweepResult, error) {
	scores := make([][]ClipScore, len(points))
	for i := range scores {
		scores[i] = make([]ClipScore, len(jobs))
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
					c, err := CameraFromLabels(j.Truth, j.Clip)
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
				cs, _, err := ReplayScore(gctx, j, cam, rules, log)
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
		out[i] = sweepResult{Point: p, Total: TotalOf(scores[i])}
	}
	return out, nil
}

// Grid is the cross product of the listed values; no scores keeps the
// camera's.
func Grid(th, area []float64, persist []time.Duration, scores ...float64) []sweepPoint {
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

// Best returns the setting that detects the most presences with at most
// budget false alarms per hour, then the smallest worst delay, then the
// smallest p95 position error; ok is false when none is within budget.
func Best(rs []sweepResult, budget float64) (sweepResult, bool) {
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
		if da, db := key(MaxOf(a.Delays)), key(MaxOf(b.Delays)); da != db {
			return da < db
		}
		return key(Quantile(a.Errors, 0.95)) < key(Quantile(b.Errors, 0.95))
	})
	return cand[0], true
}

// WriteSweepCSV writes one row per setting.
func WriteSweepCSV(w io.Writer, rs []sweepResult) error {
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
			strconv.Itoa(t.Detected), strconv.Itoa(t.Presences), f(Quantile(t.Delays, 0.5)), f(MaxOf(t.Delays)),
			strconv.Itoa(t.False), f(t.falsePerHour()), f(Quantile(t.Errors, 0.5)), f(Quantile(t.Errors, 0.95)), strconv.Itoa(t.Breaks)})
	}
	cw.Flush()
	return cw.Error()
}

// SweepChart draws, for each swept parameter, the mean over the other
// parameters of the worst first-alert delay (s) and of false alarms per
// hour against the parameter's values: one column per parameter.
func SweepChart(rs []sweepResult) (*vgimg.Canvas, error) {
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
		{"worst first-alert delay (s)", func(t scoreTotal) float64 { return MaxOf(t.Delays) }},
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
