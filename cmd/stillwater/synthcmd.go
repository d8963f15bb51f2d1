package main

import (
	"context"
	"flag"
	"fmt"
	"io"
	"strings"

	"stillwater/vision/synth"
)

// runSynth is "stillwater synth": render a clip and its labels.
func runSynth(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := flag.NewFlagSet("synth", flag.ContinueOnError)
	fs.SetOutput(stderr)
	out := fs.String("out", "clip.avi", "video `file` to write (AVI)")
	labels := fs.String("labels", "", "label `file` to write (default: the video name with .json)")
	scenario := fs.String("scenario", "child", "`name` of the scene: "+strings.Join(scenarioNames(), ", "))
	seed := fs.Int64("seed", 1, "random `seed`")
	duration := fs.Float64("duration", 0, "clip length in `seconds` (0: the scenario's own)")
	if err := fs.Parse(args); err != nil {
		return errUsage
	}
	s, ok := scenarioByName(*scenario, *seed)
	if !ok {
		return fmt.Errorf("synth: unknown scenario %q; choose one of %s: %w", *scenario, strings.Join(scenarioNames(), ", "), errUsage)
	}
	if *duration > 0 {
		s.Duration = *duration
	}
	lp := *labels
	if lp == "" {
		lp = strings.TrimSuffix(*out, ".avi") + ".json"
	}
	t, err := synth.Render(ctx, s, *out, lp)
	if err != nil {
		return err
	}
	fmt.Fprintf(stdout, "wrote %s (%d frames, %dx%d at %g fps) and %s\n", *out, t.Frames, t.Width, t.Height, t.FPS, lp)
	return nil
}
