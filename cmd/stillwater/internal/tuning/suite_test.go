package tuning

import (
	"context"
	"fmt"
	"io"
	"log/slog"
	"math"
	"os"
	"path/filepath"
	"runtime"
	"sort"
	"strings"
	"testing"
	"time"

	"golang.org/x/sync/errgroup"

	"stillwater/vision/synth"
)

// suiteClip is one generated clip of the scenario suite, or a scene of the
// randomised family (Family set: Scene is then the variant's name).
type suiteClip struct {
	Scene    string
	Seed     int64
	Duration float64 // s; 0 keeps the scene's own
	Intruder bool
	// Gate is false for a scene that is reported but not held to the
	// suite's limits (a known limit of today's detector).
	Gate bool
	// Family scenes are drawn by synth.FamilyScene(Seed, Variant) and
	// rendered once into the cache directory.
	Family  bool
	Variant synth.Variant
	// Lying draws the named scene's child floating at the surface.
	Lying bool
}

func (c suiteClip) name() string {
	if c.Lying {
		return fmt.Sprintf("%s-lying/%d", c.Scene, c.Seed)
	}
	return fmt.Sprintf("%s/%d", c.Scene, c.Seed)
}

// scene returns the clip's scene.
func (c suiteClip) scene() (synth.Scene, error) {
	if c.Family {
		return synth.FamilyScene(c.Seed, c.Variant), nil
	}
	s, ok := ScenarioByName(c.Scene, c.Seed)
	if !ok {
		return s, fmt.Errorf("no scene %q", c.Scene)
	}
	if c.Duration > 0 {
		s.Duration = c.Duration
	}
	if c.Lying {
		for i := range s.Intruders {
			s.Intruders[i].Lying = true
		}
	}
	return s, nil
}

// suiteClips is every intruder scene once (seed 7, as the end-to-end test)
// plus intruder-free footage: the nine intruder-free scenes over seeds
// 101–104 at 50 s each, 1800 s (30 min) in all.
//
// The four walk-in scenes are gated with the child floating at the
// surface (lying, the drowning posture), and reported, not gated, with
// the child upright: the renderer draws an upright child as its head and
// shoulders alone, about 0.03 m² seen from above and smeared along its
// path while it walks, the size of a resting bird that the detector's
// whole-body floor (MinBodyArea) is set to reject; it is reported once it
// stops and shows a body.
func suiteClips() []suiteClip {
	var out []suiteClip
	for _, s := range []string{"child", "submerged", "far-corner", "cloud-child"} {
		out = append(out, suiteClip{Scene: s, Seed: 7, Intruder: true, Gate: true, Lying: true})
	}
	out = append(out, suiteClip{Scene: "still-child", Seed: 7, Intruder: true, Gate: true})
	for seed := int64(101); seed <= 104; seed++ {
		for _, s := range []string{"empty", "calm", "windy", "glints", "cloud", "leaves", "bird", "deck", "night"} {
			out = append(out, suiteClip{Scene: s, Seed: seed, Duration: 50, Gate: true})
		}
	}
	for _, s := range []string{"child", "submerged", "far-corner", "cloud-child"} {
		out = append(out, suiteClip{Scene: s, Seed: 7, Intruder: true})
	}
	out = append(out, suiteClip{Scene: "bird-water", Seed: 7})
	return out
}

// suiteResult is a clip's score and how long its render and replay took.
type suiteResult struct {
	Clip   suiteClip
	Score  ClipScore
	Render time.Duration
	Replay time.Duration
	Frames int
	// StillFor is how long the intruder stays still at the end of the
	// clip, s (0 when it keeps moving or there is none).
	StillFor float64
}

// runSuite renders and replays every clip, limit at a time. Named scenes
// are rendered into dir and removed after their replay; family scenes are
// rendered once into the cache directory dir and kept.
func runSuite(ctx context.Context, dir string, clips []suiteClip, limit int) ([]suiteResult, error) {
	out := make([]suiteResult, len(clips))
	g, gctx := errgroup.WithContext(ctx)
	g.SetLimit(limit)
	log := slog.New(slog.NewTextHandler(io.Discard, nil))
	for i, c := range clips {
		g.Go(func() error {
			s, err := c.scene()
			if err != nil {
				return err
			}
			t0 := time.Now()
			var clip string
			var truth synth.Truth
			if c.Family {
				clip, _, truth, err = synth.Cached(gctx, s, dir)
			} else {
				clip = filepath.Join(dir, strings.ReplaceAll(c.name(), "/", "-")+".avi")
				truth, err = synth.Render(gctx, s, clip, "")
				defer os.Remove(clip)
			}
			if err != nil {
				return fmt.Errorf("render %s: %w", c.name(), err)
			}
			t1 := time.Now()
			cam, err := CameraFromLabels(truth, clip)
			if err != nil {
				return fmt.Errorf("%s: %w", c.name(), err)
			}
			cs, st, err := ReplayScore(gctx, ClipJob{Name: c.name(), Clip: clip, Truth: truth}, cam, DefaultScoreRules(), log)
			if err != nil {
				return err
			}
			out[i] = suiteResult{Clip: c, Score: cs, Render: t1.Sub(t0), Replay: time.Since(t1), Frames: st.Frames, StillFor: stillAtEnd(s)}
			return nil
		})
	}
	return out, g.Wait()
}

// stillAtEnd is how long the scene's intruder stays at its last waypoint
// to the end of the clip, s: 0 without an intruder, or when it leaves or
// keeps moving.
func stillAtEnd(s synth.Scene) float64 {
	if len(s.Intruders) != 1 {
		return 0
	}
	in := s.Intruders[0]
	if len(in.Path) == 0 || (in.Exit > 0 && in.Exit < s.Duration) {
		return 0
	}
	return math.Max(0, s.Duration-in.Path[len(in.Path)-1].T)
}

// suiteLimits are the suite's targets. The delay and position limits are
// this project's own; ASTM F2208 (residential pool alarms) allows 20 s
// from entry to alarm, far beyond them.
type suiteLimits struct {
	DelayMedian, DelayWorst time.Duration
	ErrMedian, ErrP95       float64 // m
	FalseAlarms             int     // over all intruder-free footage
	StillFor                time.Duration
}

func defaultSuiteLimits() suiteLimits {
	return suiteLimits{DelayMedian: time.Second, DelayWorst: 2 * time.Second, ErrMedian: 0.25, ErrP95: 0.5, StillFor: 5 * time.Minute}
}

// judgeSuite returns every broken limit; free is the intruder-free footage
// scored, s.
// judgeSuite returns the targets missed: fails (an intruder missed, the
// still child lost) and targets, the figures held to the limits (false
// alarms, delays, position errors), and the seconds of intruder-free
// footage.
func judgeSuite(rs []suiteResult, lim suiteLimits) (fails, targets []string, free float64) {
	var gated []ClipScore
	for _, r := range rs {
		if !r.Clip.Gate {
			continue
		}
		c := r.Score
		gated = append(gated, c)
		if r.Clip.Intruder && c.missed() > 0 {
			fails = append(fails, fmt.Sprintf("%s: intruder missed", c.Name))
		}
		if !r.Clip.Intruder {
			free += c.Duration
		}
		if r.Clip.Scene == "still-child" {
			if c.Breaks > 0 {
				fails = append(fails, fmt.Sprintf("%s: %d track breaks", c.Name, c.Breaks))
			}
			if c.Tracked < lim.StillFor.Seconds() {
				fails = append(fails, fmt.Sprintf("%s: tracked without a gap for %.1f s, want %v", c.Name, c.Tracked, lim.StillFor))
			}
		}
	}
	t := TotalOf(gated)
	if t.False > lim.FalseAlarms {
		targets = append(targets, fmt.Sprintf("%d false alarms over %.0f s of intruder-free footage, want ≤ %d", t.False, free, lim.FalseAlarms))
	}
	if m := Quantile(t.Delays, 0.5); !(m <= lim.DelayMedian.Seconds()) {
		targets = append(targets, fmt.Sprintf("median first-alert delay %.2f s, want ≤ %v", m, lim.DelayMedian))
	}
	if m := MaxOf(t.Delays); !(m <= lim.DelayWorst.Seconds()) {
		targets = append(targets, fmt.Sprintf("worst first-alert delay %.2f s, want ≤ %v", m, lim.DelayWorst))
	}
	if m := Quantile(t.Errors, 0.5); !(m <= lim.ErrMedian) {
		targets = append(targets, fmt.Sprintf("median position error %.3f m, want ≤ %g m", m, lim.ErrMedian))
	}
	if m := Quantile(t.Errors, 0.95); !(m <= lim.ErrP95) {
		targets = append(targets, fmt.Sprintf("p95 position error %.3f m, want ≤ %g m", m, lim.ErrP95))
	}
	return fails, targets, free
}

// BenchmarkScenarioSuite renders every scenario scene and 30 min of
// intruder-free footage, replays each through the daemon's pipeline, scores
// it against the generator's labels and fails when an intruder is missed or
// the still child is lost; the false-alarm, delay and position targets fail
// it with STILLWATER_GATE_ENFORCE=1, as for the gate set. Run
// it once: go test -run '^$' -bench ScenarioSuite -benchtime 1x ./cmd/stillwater/
func BenchmarkScenarioSuite(b *testing.B) {
	clips := suiteClips()
	for i := 0; i < b.N; i++ {
		start := time.Now()
		rs, err := runSuite(context.Background(), b.TempDir(), clips, runtime.NumCPU())
		if err != nil {
			b.Fatal(err)
		}
		wall := time.Since(start)
		var sb strings.Builder
		printSuite(&sb, rs)
		fails, targets, free := judgeSuite(rs, defaultSuiteLimits())
		frames := 0
		for _, r := range rs {
			frames += r.Frames
		}
		fmt.Fprintf(&sb, "suite: %d clips, %d frames, %.0f s intruder-free, wall %.1f s on %d CPUs (%.0f frames/s rendered and replayed)\n",
			len(rs), frames, free, wall.Seconds(), runtime.NumCPU(), float64(frames)/wall.Seconds())
		// Printed, not logged: the benchmark log keeps only ten lines.
		fmt.Print(sb.String())
		b.ReportMetric(float64(frames)/wall.Seconds(), "frames/s")
		b.ReportMetric(free, "free_s")
		if len(targets) > 0 {
			msg := "scenario suite targets missed:\n  " + strings.Join(targets, "\n  ")
			if os.Getenv("STILLWATER_GATE_ENFORCE") == "1" {
				fails = append(fails, targets...)
			} else {
				fmt.Println(msg + "\n(reported, not failed: set STILLWATER_GATE_ENFORCE=1 to fail on them)")
			}
		}
		if len(fails) > 0 {
			b.Fatal("scenario suite failed:\n  " + strings.Join(fails, "\n  "))
		}
	}
}

// printSuite writes the per-clip table, the intruder-free clips pooled per
// scene, and the totals.
func printSuite(w io.Writer, rs []suiteResult) {
	var intr []ClipScore
	byScene := map[string][]ClipScore{}
	var known []ClipScore
	for _, r := range rs {
		switch {
		case !r.Clip.Gate:
			known = append(known, r.Score)
		case r.Clip.Intruder:
			intr = append(intr, r.Score)
		default:
			byScene[r.Clip.Scene] = append(byScene[r.Clip.Scene], r.Score)
		}
	}
	var rows []ClipScore
	rows = append(rows, intr...)
	var scenes []string
	for s := range byScene {
		scenes = append(scenes, s)
	}
	sort.Strings(scenes)
	for _, s := range scenes {
		rows = append(rows, pooled(s+" ×"+fmt.Sprint(len(byScene[s])), byScene[s]))
	}
	WriteScores(w, rows)
	for _, r := range rs {
		if r.Clip.Scene == "still-child" {
			fmt.Fprintf(w, "%s: tracked without a gap for %.1f s, %d track breaks\n", r.Score.Name, r.Score.Tracked, r.Score.Breaks)
		}
	}
	if len(known) > 0 {
		fmt.Fprintln(w, "known limits, not gated:")
		WriteScores(w, known)
	}
}

// pooled merges clip scores into one row named name.
func pooled(name string, cs []ClipScore) ClipScore {
	t := TotalOf(cs)
	var d float64
	for _, c := range cs {
		d += c.Duration
	}
	return ClipScore{Name: name, Duration: d, FreeHours: t.FreeHours, Presences: t.Presences, Detected: t.Detected,
		Delays: t.Delays, False: t.False, Errors: t.Errors, Breaks: t.Breaks,
		FaultsLabelled: t.FaultsLabelled, FaultsRaised: t.FaultsRaised, FaultDelays: t.FaultDelays, FalseFaults: t.FalseFaults, FaultTargets: t.FaultTargets, FaultBreaks: t.FaultBreaks}
}

// TestScenarioQuick is the suite's quick cousin: three 20 s scenes (wind
// ripples, a far corner, a cloud with a child; the children floating, as
// the suite gates them), on seed 3, with looser limits than the benchmark.
func TestScenarioQuick(t *testing.T) {
	if testing.Short() {
		t.Skip("renders and replays three 20 s clips")
	}
	clips := []suiteClip{
		{Scene: "windy", Seed: 3, Gate: true},
		{Scene: "far-corner", Seed: 3, Intruder: true, Gate: true, Lying: true},
		{Scene: "cloud-child", Seed: 3, Intruder: true, Gate: true, Lying: true},
	}
	rs, err := runSuite(context.Background(), t.TempDir(), clips, runtime.NumCPU())
	if err != nil {
		t.Fatal(err)
	}
	var sb strings.Builder
	printSuite(&sb, rs)
	t.Log("\n" + sb.String())
	lim := defaultSuiteLimits()
	lim.DelayMedian, lim.DelayWorst, lim.ErrP95 = 2*time.Second, 3*time.Second, 0.6
	if fails, targets, _ := judgeSuite(rs, lim); len(fails)+len(targets) > 0 {
		t.Fatal(strings.Join(append(fails, targets...), "\n"))
	}
}

// TestStillChildFiveMinutes checks that a child who enters and then floats
// still for five minutes (10 fps) stays tracked the whole time: one track
// id, no cleared message while the child is in the water, and no silence
// longer than 1 s between its target messages. The scene is rendered at its
// default 640×480: at 320×240 the same child was measured to break into
// three tracks over the five minutes. The benchmark runs the same clip.
func TestStillChildFiveMinutes(t *testing.T) {
	if testing.Short() {
		t.Skip("renders and replays a 320 s clip")
	}
	s, ok := ScenarioByName("still-child", 7)
	if !ok {
		t.Fatal("no still-child scene")
	}
	clip := filepath.Join(t.TempDir(), "still.avi")
	truth, err := synth.Render(context.Background(), s, clip, "")
	if err != nil {
		t.Fatal(err)
	}
	cam, err := CameraFromLabels(truth, clip)
	if err != nil {
		t.Fatal(err)
	}
	cs, st, err := ReplayScore(context.Background(), ClipJob{Name: "still-child", Clip: clip, Truth: truth}, cam, DefaultScoreRules(), slog.New(slog.NewTextHandler(io.Discard, nil)))
	if err != nil {
		t.Fatal(err)
	}
	var sb strings.Builder
	WriteScores(&sb, []ClipScore{cs})
	t.Logf("%d frames\n%s tracked without a gap for %.1f s", st.Frames, sb.String(), cs.Tracked)
	if cs.missed() > 0 {
		t.Fatal("the child was never detected")
	}
	if cs.Breaks != 0 {
		t.Errorf("%d track breaks (a new track id or a cleared message while the child is in the water)", cs.Breaks)
	}
	// From the first alert to the end of the clip, less one update interval.
	p := truth.Presence[0]
	if want := p.To - p.From - cs.Delays[0] - 0.5; cs.Tracked < want {
		t.Errorf("tracked without a gap for %.1f s of %.1f s", cs.Tracked, want)
	}
	if e := Quantile(cs.Errors, 0.95); e > 0.5 {
		t.Errorf("p95 position error %.3f m, want ≤ 0.5 m", e)
	}
}
