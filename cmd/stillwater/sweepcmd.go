// Command stillwater sweep replays and scores clips over a grid of
// detection settings, in parallel over the cores, and writes a CSV table, a
// PNG chart and the best setting within a false-alarm budget.
package main

import (
	"context"
	"flag"
	"fmt"
	"io"
	"log/slog"
	"os"
	"runtime"
	"strconv"
	"strings"
	"time"

	"gonum.org/v1/plot/vg/vgimg"

	"stillwater/cmd/stillwater/internal/config"
	"stillwater/cmd/stillwater/internal/tuning"
)

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
	var cj []tuning.ClipJob
	for i := 0; i < len(rest); i += 2 {
		t, err := tuning.ReadLabels(rest[i+1])
		if err != nil {
			return fmt.Errorf("sweep: %w", err)
		}
		cam, err := tuning.CameraForLabels(rest[i+1], rest[i])
		if err != nil {
			return fmt.Errorf("sweep: labels %s: %w", rest[i+1], err)
		}
		cj = append(cj, tuning.ClipJob{Name: rest[i], Clip: rest[i], Truth: t, Camera: &cam})
	}
	if *jobs < 1 {
		*jobs = 1
	}
	log := slog.New(slog.NewTextHandler(stderr, &slog.HandlerOptions{Level: slog.LevelWarn}))
	start := time.Now()
	rs, err := tuning.Sweep(ctx, cj, tuning.Grid(th, ar, pe, sc...), *method, tuning.DefaultScoreRules(), *jobs, log)
	if err != nil {
		return fmt.Errorf("sweep: %w", err)
	}
	fmt.Fprintf(stderr, "sweep: %d settings × %d clips in %.1f s\n", len(rs), len(cj), time.Since(start).Seconds())
	if err := writeFile(*csvPath, func(w io.Writer) error { return tuning.WriteSweepCSV(w, rs) }); err != nil {
		return fmt.Errorf("sweep: %w", err)
	}
	if *pngPath != "" {
		c, err := tuning.SweepChart(rs)
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
	b, ok := tuning.Best(rs, *budget)
	if !ok {
		return fmt.Errorf("sweep: no setting stays within %g false alarms per hour", *budget)
	}
	t := b.Total
	score := ""
	if b.Point.MinScore > 0 {
		score = fmt.Sprintf(", min_score %g", b.Point.MinScore)
	}
	fmt.Fprintf(stdout, "best within %g false alarms/h: method %s, threshold %g, min_area_m2 %g%s, persist %v: detected %d/%d, worst delay %s s, %d false, p95 error %s m\n",
		*budget, *method, b.Point.Threshold, b.Point.MinArea, score, b.Point.Persist, t.Detected, t.Presences, tuning.FmtNum(tuning.MaxOf(t.Delays), 2), t.False, tuning.FmtNum(tuning.Quantile(t.Errors, 0.95), 3))
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
