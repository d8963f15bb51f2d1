// Command stillwater synth renders synthetic pool clips with their label
// files: a named scene, or scenes of the randomised family.
package main

import (
	"context"
	"flag"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"strings"

	"stillwater/cmd/stillwater/internal/tuning"
	"stillwater/vision/synth"
)

// runSynth is "stillwater synth": render a clip and its labels.
func runSynth(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := flag.NewFlagSet("synth", flag.ContinueOnError)
	fs.SetOutput(stderr)
	out := fs.String("out", "clip.avi", "video `file` to write (AVI) for a named scene")
	labels := fs.String("labels", "", "label `file` to write for a named scene (default: the video name with .json)")
	scenario := fs.String("scenario", "child", "`name` of the scene: "+strings.Join(tuning.ScenarioNames(), ", "))
	seed := fs.Int64("seed", 1, "random `seed` (the first of -count seeds with -family)")
	duration := fs.Float64("duration", 0, "clip length in `seconds` (0: the scene's own)")
	family := fs.Bool("family", false, "draw the scene from the randomised family instead of a named scene")
	variant := fs.String("variant", "intruder", "family `variant`: quiet, intruder or fault")
	count := fs.Int("count", 1, "with -family: how many consecutive seeds")
	dir := fs.String("o", ".", "with -family: `directory` for the clips and labels (a render cache: clips already there are kept)")
	sheet := fs.Bool("sheet", false, "with -family: write only a contact sheet PNG (four frames per scene) into -o")
	if err := fs.Parse(args); err != nil {
		return errUsage
	}
	if fs.NArg() > 0 {
		return fmt.Errorf("synth: unexpected argument %q: %w", fs.Arg(0), errUsage)
	}
	if *family {
		v, err := synth.ParseVariant(*variant)
		if err != nil {
			return fmt.Errorf("synth: -variant: %v: %w", err, errUsage)
		}
		if *count < 1 {
			return fmt.Errorf("synth: -count %d: want at least 1: %w", *count, errUsage)
		}
		return runSynthFamily(ctx, synthFamilyArgs{seed: *seed, count: *count, v: v, dir: *dir, duration: *duration, sheet: *sheet}, stdout, stderr)
	}
	s, ok := tuning.ScenarioByName(*scenario, *seed)
	if !ok {
		return fmt.Errorf("synth: unknown scenario %q; choose one of %s: %w", *scenario, strings.Join(tuning.ScenarioNames(), ", "), errUsage)
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

type synthFamilyArgs struct {
	seed     int64
	count    int
	v        synth.Variant
	dir      string
	duration float64
	sheet    bool
}

// runSynthFamily renders family scenes into a directory, or a contact sheet
// of them.
func runSynthFamily(ctx context.Context, a synthFamilyArgs, stdout, stderr io.Writer) error {
	if last := a.seed + int64(a.count) - 1; a.seed <= synth.GateSeedMax && last >= synth.GateSeedMin {
		fmt.Fprintf(stderr, "synth: seeds %d–%d reach the gate range (%d–%d): look, but do not tune on them\n",
			a.seed, a.seed+int64(a.count)-1, synth.GateSeedMin, synth.GateSeedMax)
	}
	var scenes []synth.Scene
	for k := 0; k < a.count; k++ {
		s := synth.FamilyScene(a.seed+int64(k), a.v)
		if a.duration > 0 {
			s.Duration = a.duration
		}
		scenes = append(scenes, s)
	}
	if err := os.MkdirAll(a.dir, 0o755); err != nil {
		return fmt.Errorf("synth: %w", err)
	}
	if a.sheet {
		name := fmt.Sprintf("sheet-%s-%d.png", a.v, a.seed)
		if a.count > 1 {
			name = fmt.Sprintf("sheet-%s-%d-%d.png", a.v, a.seed, a.seed+int64(a.count)-1)
		}
		p := filepath.Join(a.dir, name)
		if err := synth.WriteSheet(ctx, p, scenes, []float64{0.1, 0.35, 0.6, 0.9}, 480); err != nil {
			return fmt.Errorf("synth: %w", err)
		}
		fmt.Fprintf(stdout, "wrote %s (%d scenes, four frames each)\n", p, len(scenes))
		return nil
	}
	for _, s := range scenes {
		video, labels, t, err := synth.Cached(ctx, s, a.dir)
		if err != nil {
			return fmt.Errorf("synth: %w", err)
		}
		fmt.Fprintf(stdout, "wrote %s (%d frames, %dx%d at %g fps, %s) and %s: %s\n",
			video, t.Frames, t.Width, t.Height, t.FPS, s.World.Encoding.Codec, labels, describeFamily(s, t))
	}
	return nil
}

// describeFamily says in a few words what a family scene holds.
func describeFamily(s synth.Scene, t synth.Truth) string {
	w := s.World
	var parts []string
	if w.Light.Night {
		parts = append(parts, fmt.Sprintf("night, %d pool lamps", len(w.Lamps)))
	} else {
		parts = append(parts, "day")
	}
	parts = append(parts, fmt.Sprintf("pool %gx%g m, camera %.1f m up, %.0f° lens", s.PoolLength, s.PoolWidth, s.Camera.Height, s.Camera.HFOVDeg))
	for _, p := range t.Presence {
		parts = append(parts, fmt.Sprintf("child in the water %.1f–%.1f s", p.From, p.To))
	}
	for _, f := range t.Faults {
		parts = append(parts, fmt.Sprintf("%s picture %.1f–%.1f s", f.Kind, f.From, f.To))
	}
	for _, e := range t.Events {
		parts = append(parts, e.Kind)
	}
	return strings.Join(parts, "; ")
}
