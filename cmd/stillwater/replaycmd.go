// Command stillwater replay runs the daemon's detection pipeline over a
// recorded clip as fast as the CPU allows and writes every message it would
// publish as one JSON line.
package main

import (
	"bufio"
	"context"
	"flag"
	"fmt"
	"io"
	"log/slog"
	"os"

	"stillwater/cmd/stillwater/internal/config"
	"stillwater/cmd/stillwater/internal/pipeline"
	"stillwater/cmd/stillwater/internal/tuning"
)

// runReplay is "stillwater replay".
func runReplay(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := flag.NewFlagSet("replay", flag.ContinueOnError)
	fs.SetOutput(stderr)
	clip := fs.String("clip", "", "video `file` to replay")
	cfgPath := fs.String("config", "", "daemon config `file` (with -camera)")
	camID := fs.String("camera", "", "camera `id` in the config whose settings to use")
	labels := fs.String("labels", "", "label `file` (stillwater.labels/v1 or pool-holdout-v1) giving the calibration (instead of -config)")
	out := fs.String("out", "", "output `file` (default standard output)")
	prefix := fs.String("prefix", "stillwater", "bus subject `prefix` with -labels")
	verbose := fs.Bool("v", false, "log at debug level to standard error; with -labels, also say why the labelled intruder is not reported (at most once a second)")
	why := fs.String("why", "", "with -labels, explain these frame `numbers` (\"120,121\") on standard error")
	var ov config.DetectOverrides
	ov.Register(fs)
	if err := fs.Parse(args); err != nil {
		return errUsage
	}
	if *clip == "" {
		return fmt.Errorf("replay: -clip is required: %w", errUsage)
	}
	if err := ov.Validate(); err != nil {
		return fmt.Errorf("replay: %w: %w", err, errUsage)
	}
	var cam config.CameraConfig
	pfx := *prefix
	switch {
	case *labels != "" && *cfgPath != "":
		return fmt.Errorf("replay: give either -labels or -config, not both: %w", errUsage)
	case *labels != "":
		var err error
		cam, err = tuning.CameraForLabels(*labels, *clip)
		if err != nil {
			return fmt.Errorf("replay: labels %s: %w", *labels, err)
		}
	case *cfgPath != "":
		cfg, err := config.LoadConfig(*cfgPath)
		if err != nil {
			return fmt.Errorf("replay: %w", err)
		}
		c, ok := findCamera(cfg, *camID)
		if !ok {
			return fmt.Errorf("replay: config %s has no camera %q (use -camera): %w", *cfgPath, *camID, errUsage)
		}
		cam, pfx = c, cfg.Bus.Prefix
		cam.Source = *clip
	default:
		return fmt.Errorf("replay: give -labels or -config and -camera: %w", errUsage)
	}
	cam.Detect = ov.Apply(cam.Detect)
	if err := config.ValidateDetect("replay", cam.Detect); err != nil {
		return fmt.Errorf("replay: %w", err)
	}
	var opts []func(*pipeline.Processor)
	if *labels != "" && (*verbose || *why != "") {
		o, err := tuning.ExplainOption(*labels, *why, *verbose, stderr)
		if err != nil {
			return fmt.Errorf("replay: %w", err)
		}
		opts = append(opts, o)
	} else if *why != "" {
		return fmt.Errorf("replay: -why needs -labels: %w", errUsage)
	}
	w := stdout
	if *out != "" {
		f, err := os.Create(*out)
		if err != nil {
			return fmt.Errorf("replay: %w", err)
		}
		defer f.Close()
		w = f
	}
	lv := slog.LevelWarn
	if *verbose {
		lv = slog.LevelDebug
	}
	log := slog.New(slog.NewTextHandler(stderr, &slog.HandlerOptions{Level: lv}))
	bw := bufio.NewWriter(w)
	st, err := tuning.ReplayClip(ctx, cam, pfx, bw, log, opts...)
	if ferr := bw.Flush(); err == nil && ferr != nil {
		err = fmt.Errorf("replay: write output: %w", ferr)
	}
	if err != nil {
		return err
	}
	fmt.Fprintf(stderr, "replay: %d frames (%.1f s of media) in %.1f s, %d messages\n", st.Frames, st.Media.Seconds(), st.Elapsed.Seconds(), st.Messages)
	return nil
}

// findCamera returns the camera with id, or the only camera when id is empty.
func findCamera(cfg config.Config, id string) (config.CameraConfig, bool) {
	if id == "" && len(cfg.Cameras) == 1 {
		return cfg.Cameras[0], true
	}
	for _, c := range cfg.Cameras {
		if c.ID == id {
			return c, true
		}
	}
	return config.CameraConfig{}, false
}
