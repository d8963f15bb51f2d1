package tuning

import (
	"context"
	"fmt"
	"io"
	"math"
	"os"
	"path/filepath"
	"runtime"
	"sort"
	"strings"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"stillwater/vision/synth"
)

// A family set is a fixed list of scenes of the randomised family: the
// gate set from the gate seed range, which nobody tunes on, and the tuning
// set from the tuning range. Each holds intruder-free (Quiet) scenes up to
// an amount of footage, a number of Intruder scenes (about one in eight of
// which keeps a child still for minutes) and a number of CameraFault
// scenes, each kind on the seeds counted up from the range's first seed
// (the same seed with another variant is another world). The sets are a
// fixed function of the family: the seeds are not drawn.

// familyQuota is how much of each variant a set holds.
type familyQuota struct {
	QuietSeconds float64 // at least this much intruder-free footage
	Intruders    int
	Faults       int
}

// fullQuota is the whole gate or tuning set: over 60 minutes of Quiet
// footage, 36 intruders, 18 camera faults.
var fullQuota = familyQuota{QuietSeconds: 3600, Intruders: 36, Faults: 18}

// familySet returns the set's clips, seeds counted up from first.
func familySet(first int64, q familyQuota) []suiteClip {
	var out []suiteClip
	var quiet float64
	for seed := first; quiet < q.QuietSeconds; seed++ {
		out = append(out, familyClip(seed, synth.Quiet))
		quiet += synth.FamilyScene(seed, synth.Quiet).Duration
	}
	for i := 0; i < q.Intruders; i++ {
		out = append(out, familyClip(first+int64(i), synth.Intruder))
	}
	for i := 0; i < q.Faults; i++ {
		out = append(out, familyClip(first+int64(i), synth.CameraFault))
	}
	return out
}

func familyClip(seed int64, v synth.Variant) suiteClip {
	return suiteClip{Scene: v.String(), Seed: seed, Family: true, Variant: v, Intruder: v == synth.Intruder, Gate: true}
}

// familySample is the part of a set run by default: the given seeds of
// each variant, a fixed choice that renders and replays in about 8–10
// minutes on the 2-core CI machine with an empty cache.
func familySample(quiet, intruders, faults []int64) []suiteClip {
	var out []suiteClip
	for _, s := range quiet {
		out = append(out, familyClip(s, synth.Quiet))
	}
	for _, s := range intruders {
		out = append(out, familyClip(s, synth.Intruder))
	}
	for _, s := range faults {
		out = append(out, familyClip(s, synth.CameraFault))
	}
	return out
}

// gateSample and tuningSample are the default runs: from the first seeds
// of each range, 6 Quiet scenes, 8 Intruder scenes (one of them a child
// still for minutes) and one fault of each kind (black, frozen, noise).
func gateSample() []suiteClip {
	g := synth.GateSeedMin
	return familySample(seq(g, 6), append(seq(g, 7), g+12), []int64{g, g + 1, g + 2})
}

func tuningSample() []suiteClip {
	t := synth.TuningSeedMin
	return familySample(seq(t, 6), seq(t, 8), []int64{t, t + 1, t + 5})
}

// seq returns n seeds from first.
func seq(first int64, n int) []int64 {
	out := make([]int64, n)
	for i := range out {
		out[i] = first + int64(i)
	}
	return out
}

// synthCache is where family scenes are rendered once:
// $STILLWATER_SYNTH_CACHE, or testdata/cache/synth under the module root.
func synthCache(tb testing.TB) string {
	if d := os.Getenv("STILLWATER_SYNTH_CACHE"); d != "" {
		return d
	}
	dir, err := os.Getwd()
	require.NoError(tb, err)
	for {
		if _, err := os.Stat(filepath.Join(dir, "go.mod")); err == nil {
			return filepath.Join(dir, "testdata", "cache", "synth")
		}
		up := filepath.Dir(dir)
		require.NotEqual(tb, up, dir, "no go.mod above the working directory")
		dir = up
	}
}

// familyLimits are the targets a family set is judged on. The picture
// fault limits hold whatever the detector does; the others hold only when
// the run asks for gating (see BenchmarkGateSet).
type familyLimits struct {
	suite      suiteLimits
	FaultDelay time.Duration // a labelled fault must raise its fault within this
}

func defaultFamilyLimits() familyLimits {
	return familyLimits{suite: defaultSuiteLimits(), FaultDelay: 3 * time.Second}
}

// familyFigures are the printed figures of a family set.
type familyFigures struct {
	Total                   scoreTotal
	QuietHours              float64
	Still                   []stillFigure
	FaultsInTime            int // labelled faults raised within the fault limit
	Frames                  int
	Wall, RenderCPU, Replay time.Duration
}

// stillFigure is one child still for minutes: how long it stayed still and
// the longest time one track kept reporting it.
type stillFigure struct {
	Name              string
	StillFor, Tracked float64
	Breaks            int
}

// longStill is the shortest end-of-clip stillness counted as a child still
// for minutes.
const longStill = 120.0

func familyFiguresOf(rs []suiteResult, lim familyLimits) familyFigures {
	var f familyFigures
	var cs []ClipScore
	for _, r := range rs {
		cs = append(cs, r.Score)
		f.Frames += r.Frames
		f.RenderCPU += r.Render
		f.Replay += r.Replay
		if r.Clip.Variant == synth.Quiet {
			f.QuietHours += r.Score.Duration / 3600
		}
		if r.Clip.Intruder && r.StillFor >= longStill {
			f.Still = append(f.Still, stillFigure{Name: r.Score.Name, StillFor: r.StillFor, Tracked: r.Score.Tracked, Breaks: r.Score.Breaks})
		}
		for _, d := range r.Score.FaultDelays {
			if d <= lim.FaultDelay.Seconds() {
				f.FaultsInTime++
			}
		}
	}
	f.Total = TotalOf(cs)
	return f
}

// judgeFamily returns the broken picture-fault limits, which always count
// (every labelled fault raised within FaultDelay), and the other broken
// limits, which count when gating is asked for.
func judgeFamily(f familyFigures, lim familyLimits) (faultFails, detectFails []string) {
	t := f.Total
	if f.FaultsInTime < t.FaultsLabelled {
		faultFails = append(faultFails, fmt.Sprintf("%d of %d camera faults not raised within %v", t.FaultsLabelled-f.FaultsInTime, t.FaultsLabelled, lim.FaultDelay))
	}
	l := lim.suite
	// A live picture whose encoder drops calm water's small changes can
	// look frozen (see vision.HealthMonitor): a known limit, gated with the
	// detection targets.
	if t.FalseFaults > 0 {
		detectFails = append(detectFails, fmt.Sprintf("%d picture faults raised where none is labelled", t.FalseFaults))
	}
	if t.Detected < t.Presences {
		detectFails = append(detectFails, fmt.Sprintf("%d of %d intruders missed", t.Presences-t.Detected, t.Presences))
	}
	if t.False > l.FalseAlarms {
		detectFails = append(detectFails, fmt.Sprintf("%d false alarms, want ≤ %d", t.False, l.FalseAlarms))
	}
	if t.FaultBreaks > 0 {
		detectFails = append(detectFails, fmt.Sprintf("%d camera faults cleared while the picture was still bad", t.FaultBreaks))
	}
	if t.FaultTargets > 0 {
		detectFails = append(detectFails, fmt.Sprintf("%d targets raised during camera faults", t.FaultTargets))
	}
	if m := Quantile(t.Delays, 0.5); !(m <= l.DelayMedian.Seconds()) {
		detectFails = append(detectFails, fmt.Sprintf("median first-alert delay %s s, want ≤ %v", FmtNum(m, 2), l.DelayMedian))
	}
	if m := MaxOf(t.Delays); !(m <= l.DelayWorst.Seconds()) {
		detectFails = append(detectFails, fmt.Sprintf("worst first-alert delay %s s, want ≤ %v", FmtNum(m, 2), l.DelayWorst))
	}
	if m := Quantile(t.Errors, 0.5); !(m <= l.ErrMedian) {
		detectFails = append(detectFails, fmt.Sprintf("median position error %s m, want ≤ %g m", FmtNum(m, 3), l.ErrMedian))
	}
	if m := Quantile(t.Errors, 0.95); !(m <= l.ErrP95) {
		detectFails = append(detectFails, fmt.Sprintf("p95 position error %s m, want ≤ %g m", FmtNum(m, 3), l.ErrP95))
	}
	for _, s := range f.Still {
		// Kept as one track for the whole stillness, less one update
		// interval.
		if s.Tracked < s.StillFor-0.5 || s.Breaks > 0 {
			detectFails = append(detectFails, fmt.Sprintf("%s: still for %.0f s, one track kept %.1f s with %d breaks", s.Name, s.StillFor, s.Tracked, s.Breaks))
		}
	}
	return faultFails, detectFails
}

// printFamily writes the per-clip table (Quiet scenes pooled), the
// still children, the faults by kind and the headline figures.
func printFamily(w io.Writer, name string, rs []suiteResult, f familyFigures) {
	var rows []ClipScore
	var quiet []ClipScore
	for _, r := range rs {
		if r.Clip.Variant == synth.Quiet {
			quiet = append(quiet, r.Score)
			continue
		}
		rows = append(rows, r.Score)
	}
	if len(quiet) > 0 {
		rows = append([]ClipScore{pooled(fmt.Sprintf("quiet ×%d", len(quiet)), quiet)}, rows...)
	}
	WriteScores(w, rows)
	var loud []string
	for _, q := range quiet {
		if q.False > 0 {
			loud = append(loud, fmt.Sprintf("%s %d", q.Name, q.False))
		}
	}
	if len(loud) > 0 {
		fmt.Fprintf(w, "quiet scenes with false alarms: %s\n", strings.Join(loud, ", "))
	}
	for _, s := range f.Still {
		fmt.Fprintf(w, "%s: child still for %.0f s, one track kept %.1f s, %d track breaks\n", s.Name, s.StillFor, s.Tracked, s.Breaks)
	}
	kinds := map[string][]string{}
	for _, r := range rs {
		for i, fl := range r.Score.FaultKinds {
			d := "never"
			if !math.IsNaN(r.Score.FaultEach[i]) {
				d = fmt.Sprintf("%.1f s", r.Score.FaultEach[i])
			}
			kinds[fl] = append(kinds[fl], fmt.Sprintf("%s %s", r.Score.Name, d))
		}
	}
	var ks []string
	for k := range kinds {
		ks = append(ks, k)
	}
	sort.Strings(ks)
	for _, k := range ks {
		fmt.Fprintf(w, "%s faults raised after: %s\n", k, strings.Join(kinds[k], ", "))
	}
	t := f.Total
	still := "-"
	if len(f.Still) > 0 {
		lo := f.Still[0]
		for _, s := range f.Still {
			if s.Tracked < lo.Tracked {
				lo = s
			}
		}
		still = fmt.Sprintf("shortest %.1f s (%s, still for %.0f s)", lo.Tracked, lo.Name, lo.StillFor)
	}
	fmt.Fprintf(w, "%s: intruders detected %d/%d; first alert median %s s, worst %s s; false alarms %d over %.2f h intruder-free (%.2f h of Quiet scenes); still child kept as one track: %s; position error median %s m, p95 %s m; camera faults raised within 3 s %d/%d, cleared while on %d, targets during faults %d; %d clips, %d frames in %.0f s\n",
		name, t.Detected, t.Presences, FmtNum(Quantile(t.Delays, 0.5), 2), FmtNum(MaxOf(t.Delays), 2), t.False, t.FreeHours, f.QuietHours,
		still, FmtNum(Quantile(t.Errors, 0.5), 3), FmtNum(Quantile(t.Errors, 0.95), 3), f.FaultsInTime, t.FaultsLabelled, t.FaultBreaks, t.FaultTargets,
		len(rs), f.Frames, f.Wall.Seconds())
}

// runFamilyBench renders (into the cache), replays and scores the clips
// and reports the figures. It fails on a picture-fault limit always and on
// a detection limit when gate is set.
func runFamilyBench(b *testing.B, name string, clips []suiteClip, gate bool) {
	dir := synthCache(b)
	lim := defaultFamilyLimits()
	for i := 0; i < b.N; i++ {
		start := time.Now()
		rs, err := runSuite(context.Background(), dir, clips, runtime.NumCPU())
		if err != nil {
			b.Fatal(err)
		}
		f := familyFiguresOf(rs, lim)
		f.Wall = time.Since(start)
		var sb strings.Builder
		printFamily(&sb, name, rs, f)
		// Printed, not logged: the benchmark log keeps only ten lines.
		fmt.Print(sb.String())
		t := f.Total
		b.ReportMetric(float64(t.Detected), "detected")
		b.ReportMetric(float64(t.Presences), "intruders")
		b.ReportMetric(Quantile(t.Delays, 0.5), "delay_med_s")
		b.ReportMetric(MaxOf(t.Delays), "delay_max_s")
		b.ReportMetric(float64(t.False), "false")
		b.ReportMetric(t.FreeHours, "free_h")
		if len(f.Still) > 0 {
			lo := f.Still[0].Tracked
			for _, s := range f.Still {
				lo = min(lo, s.Tracked)
			}
			b.ReportMetric(lo, "still_track_s")
		}
		b.ReportMetric(Quantile(t.Errors, 0.5), "err_med_m")
		b.ReportMetric(Quantile(t.Errors, 0.95), "err_p95_m")
		b.ReportMetric(float64(f.FaultsInTime), "faults_3s")
		b.ReportMetric(float64(t.FaultsLabelled), "faults")
		b.ReportMetric(float64(t.FaultTargets), "fault_targets")
		b.ReportMetric(float64(t.FaultBreaks), "fault_breaks")
		b.ReportMetric(f.Wall.Seconds(), "wall_s")
		faultFails, detectFails := judgeFamily(f, lim)
		if len(faultFails) > 0 {
			b.Error("camera fault targets missed:\n  " + strings.Join(faultFails, "\n  "))
		}
		if len(detectFails) > 0 {
			msg := name + " detection targets missed:\n  " + strings.Join(detectFails, "\n  ")
			if gate {
				b.Error(msg)
			} else {
				fmt.Println(msg + "\n(reported, not failed: set STILLWATER_GATE_ENFORCE=1 to fail on them)")
			}
		}
	}
}

// BenchmarkGateSet renders the gate set's scenes into the cache (once),
// replays each through the daemon's pipeline calibrated from its labels as
// an installer would (raw corners, lens, camera position, depth), scores
// it and prints the figures. By default it runs a fixed sample
// (gateSample); STILLWATER_GATE=full runs the whole set (over 60 minutes of
// Quiet footage, 36 intruders, 18 faults). It always fails on a camera
// fault not raised within 3 s; it fails on a missed intruder, a false
// alarm, a picture fault raised on a good picture or another target only
// with STILLWATER_GATE_ENFORCE=1. Run it once:
//
//	go test -run '^$' -bench GateSet -benchtime 1x -timeout 60m ./cmd/stillwater/
func BenchmarkGateSet(b *testing.B) {
	clips := gateSample()
	if os.Getenv("STILLWATER_GATE") == "full" {
		clips = familySet(synth.GateSeedMin, fullQuota)
	}
	runFamilyBench(b, "gate set", clips, os.Getenv("STILLWATER_GATE_ENFORCE") == "1")
}

// BenchmarkTuningSet is BenchmarkGateSet on the tuning seeds, the ones
// to tune on; it never fails on a detection target. STILLWATER_TUNING=full
// runs the whole tuning set.
func BenchmarkTuningSet(b *testing.B) {
	clips := tuningSample()
	if os.Getenv("STILLWATER_TUNING") == "full" {
		clips = familySet(synth.TuningSeedMin, fullQuota)
	}
	runFamilyBench(b, "tuning set", clips, false)
}

// TestFamilySets checks what the sets hold without rendering them: the
// full gate set has at least 60 minutes of Quiet footage, at least 30
// intruders (some still for minutes) and faults of every kind, all on gate
// seeds; the tuning set only tuning seeds; the samples are parts of their
// sets.
func TestFamilySets(t *testing.T) {
	for _, tc := range []struct {
		name   string
		set    []suiteClip
		sample []suiteClip
		inGate bool
	}{
		{"gate", familySet(synth.GateSeedMin, fullQuota), gateSample(), true},
		{"tuning", familySet(synth.TuningSeedMin, fullQuota), tuningSample(), false},
	} {
		t.Run(tc.name, func(t *testing.T) {
			var quiet float64
			intruders, still := 0, 0
			kinds := map[string]int{}
			in := map[string]bool{}
			for _, c := range tc.set {
				in[c.name()] = true
				assert.Equal(t, tc.inGate, synth.IsGateSeed(c.Seed), c.name())
				if !tc.inGate {
					assert.True(t, c.Seed >= synth.TuningSeedMin && c.Seed <= synth.TuningSeedMax, c.name())
				}
				s := synth.FamilyScene(c.Seed, c.Variant)
				switch c.Variant {
				case synth.Quiet:
					quiet += s.Duration
				case synth.Intruder:
					intruders++
					if stillAtEnd(s) >= longStill {
						still++
					}
				case synth.CameraFault:
					for _, f := range s.World.Faults {
						kinds[f.Kind]++
					}
				}
			}
			assert.GreaterOrEqual(t, quiet, 3600.0, "Quiet footage, s")
			assert.GreaterOrEqual(t, intruders, 30)
			assert.GreaterOrEqual(t, still, 2, "children still for minutes")
			for _, k := range []string{synth.FaultBlack, synth.FaultFrozen, synth.FaultNoise} {
				assert.GreaterOrEqual(t, kinds[k], 3, "%s faults", k)
			}
			sampleKinds := map[string]bool{}
			sampleStill := 0
			for _, c := range tc.sample {
				assert.True(t, in[c.name()], "sample clip %s is in the set", c.name())
				s := synth.FamilyScene(c.Seed, c.Variant)
				for _, f := range s.World.Faults {
					sampleKinds[f.Kind] = true
				}
				if c.Variant == synth.Intruder && stillAtEnd(s) >= longStill {
					sampleStill++
				}
			}
			assert.Len(t, sampleKinds, 3, "the sample has a fault of each kind")
			assert.Equal(t, 1, sampleStill, "the sample has one child still for minutes")
			t.Logf("%s set: %d clips, %.0f s of Quiet footage, %d intruders (%d still for minutes), faults %v; sample %d clips",
				tc.name, len(tc.set), quiet, intruders, still, kinds, len(tc.sample))
		})
	}
}
