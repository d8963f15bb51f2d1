package main

import (
	"context"
	"flag"
	"fmt"
	"io"
	"log/slog"
	"os"

	"stillwater/cmd/stillwater/internal/demo"
	"stillwater/cmd/stillwater/internal/tuning"
)

// runDemo is "stillwater demo": the daemon on a generated clip, an
// in-process bus and metrics on 127.0.0.1, printing what arrives.
func runDemo(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := flag.NewFlagSet("demo", flag.ContinueOnError)
	fs.SetOutput(stderr)
	scenario := fs.String("scenario", "child", "synthetic `scene` to watch")
	seed := fs.Int64("seed", 1, "random `seed` of the scene")
	dir := fs.String("dir", "", "working `directory` (default: a temporary one, removed after)")
	realtime := fs.Bool("realtime", false, "pace the clip at its frame rate like a live camera")
	verbose := fs.Bool("v", false, "log at debug level")
	upright := fs.Bool("upright", false, "draw the child upright, head and shoulders only, instead of floating")
	if err := fs.Parse(args); err != nil {
		return errUsage
	}
	s, ok := tuning.ScenarioByName(*scenario, *seed)
	if !ok {
		return fmt.Errorf("demo: unknown scenario %q: %w", *scenario, errUsage)
	}
	if !*upright {
		tuning.FloatingChild(&s)
	}
	work := *dir
	if work == "" {
		d, err := os.MkdirTemp("", "stillwater-demo-")
		if err != nil {
			return err
		}
		defer os.RemoveAll(d)
		work = d
	}
	lv := slog.LevelInfo
	if *verbose {
		lv = slog.LevelDebug
	}
	log := slog.New(slog.NewTextHandler(stderr, &slog.HandlerOptions{Level: lv}))
	res, err := demo.Run(ctx, s, work, *realtime, log, stdout)
	if err != nil {
		return err
	}
	res.Print(stdout)
	return nil
}
