package pipeline_test

import (
	"context"
	"errors"
	"fmt"
	"image"
	"io"
	"log/slog"
	"strings"
	"testing"
	"time"

	"stillwater/cmd/stillwater/internal/config"
	"stillwater/cmd/stillwater/internal/pipeline"
	"stillwater/cmd/stillwater/internal/testkit"
	"stillwater/cmd/stillwater/internal/tuning"
	"stillwater/homography"
	"stillwater/vision"
	"stillwater/vision/synth"
)

// framePathSizes are a camera's usual sub stream and its two usual main
// streams.
var framePathSizes = []image.Point{{640, 360}, {1280, 720}, {1920, 1080}}

// framePathClip is synth.StageClip, failing tb when it cannot be made.
func framePathClip(tb testing.TB, size image.Point) (string, synth.Truth) {
	tb.Helper()
	video, truth, err := synth.StageClip(context.Background(), size)
	if err != nil {
		tb.Fatal(err)
	}
	return video, truth
}

// BenchmarkFramePath times, per frame and at each of framePathSizes, every
// stage of one camera's frame path as the daemon runs it, one
// sub-benchmark per size. The camera is configured from the clip's labels
// as an installer would (corners, lens, camera position, depths), with the
// default detect settings: the mean–variance detector on its pool grid.
//
//   - decode: the camera reading the H.264 clip (in the daemon, on the
//     camera's goroutine);
//   - checks: the picture-health probe;
//   - rectify, model, candidates: the detector's stages (resize and
//     colour onto the grid; the background model; clean-up, components
//     and their features);
//   - gate, judge: Processor.Step placing, zoning and size-gating the
//     candidates, and judging which tracks may alarm;
//   - mapping: the calibration taking each candidate's centroid from
//     source pixels to the pool surface and then to the floor below it
//     (the pixel path of the other detectors, and the floor position of
//     each target message);
//   - track: the tracker in pool metres;
//   - alarm: the alarm's decisions and the encoding of their messages;
//   - publish: each message published to an in-process JetStream server
//     and acknowledged, as the daemon's sink does.
//
// The model learns on the first two thirds of the clip, then the last
// third (the child in the water) is timed; everything runs on one
// goroutine, with OpenCV's pool at the daemon's default size
// (opencv_threads 1), and the figures are wall time per timed frame. Messages are
// few, so publishing is timed over every message of the clip and given
// per message and spread over the frames of the whole clip.
//
//	go test -run '^$' -bench FramePath -benchtime 1x ./cmd/stillwater/internal/pipeline/
func BenchmarkFramePath(b *testing.B) {
	// OpenCV's pool as the daemon sizes it by default.
	if err := config.Defaults().ApplyOpenCVThreads(); err != nil {
		b.Fatal(err)
	}
	for _, size := range framePathSizes {
		b.Run(fmt.Sprintf("%dx%d", size.X, size.Y), func(b *testing.B) {
			clip, truth := framePathClip(b, size)
			cam, err := tuning.CameraFromLabels(truth, clip)
			if err != nil {
				b.Fatal(err)
			}
			cam.FrameTimeout = config.Duration(config.DefaultFrameTimeout)
			cfg := config.Defaults()
			cfg.Cameras = []config.CameraConfig{cam}
			if err := cfg.Validate(); err != nil {
				b.Fatal(err)
			}
			cal, err := config.NewCalibration(cam)
			if err != nil {
				b.Fatal(err)
			}
			dc, err := pipeline.DetectorConfig(cam, cal)
			if err != nil {
				b.Fatal(err)
			}
			log := slog.New(slog.NewTextHandler(io.Discard, nil))
			bus := testkit.OpenBus(b, testkit.BusConfig(b), log, config.BusHooks{})
			testkit.RunBus(b, bus)

			var st framePathTimes
			for i := 0; i < b.N; i++ {
				if err := st.run(cam, cal, dc, bus, truth.Frames, log); err != nil {
					b.Fatal(err)
				}
			}
			if st.timed == 0 || st.searched == 0 {
				b.Fatalf("%s: no frame was timed", clip)
			}
			if st.vision.Frames == 0 || st.step.Frames == 0 {
				b.Fatalf("%s: no timed frame reached the detector's candidates (%d) or Step (%d)", clip, st.vision.Frames, st.step.Frames)
			}
			line := fmt.Sprintf("frame path at %dx%d (ms/frame over %d timed frames):", size.X, size.Y, st.timed/b.N)
			var sum float64
			for _, s := range st.stages() {
				ms := perFrameMs(s.d, st.timed)
				sum += ms
				b.ReportMetric(ms, s.name+"_ms/frame")
				line += fmt.Sprintf(" %s %.3f,", s.name, ms)
			}
			pubFrame := perFrameMs(st.publish, st.searched)
			b.ReportMetric(pubFrame, "publish_ms/frame")
			line += fmt.Sprintf(" publish %.3f", pubFrame)
			if st.messages > 0 {
				pubMsg := perFrameMs(st.publish, st.messages)
				b.ReportMetric(pubMsg, "publish_ms/msg")
				line += fmt.Sprintf(" (%.3f per acked message, %d messages in %d frames)", pubMsg, st.messages/b.N, st.searched/b.N)
			} else {
				line += " (no message in the clip)"
			}
			b.ReportMetric(sum+pubFrame, "total_ms/frame")
			line += fmt.Sprintf("; total %.2f", sum+pubFrame)
			// Printed, not logged: the benchmark log keeps only ten lines.
			fmt.Println(line)
		})
	}
}

// framePathTimes adds up the stages over the runs of a benchmark.
type framePathTimes struct {
	vision   vision.StageClock
	step     pipeline.StepClock
	mapping  time.Duration
	publish  time.Duration
	timed    int // frames timed (the last third of each run)
	searched int // frames of the clip given to Step
	messages int
	depth    float64 // the mapped floor depths, kept so the mapping is used
}

type namedStage struct {
	name string
	d    time.Duration
}

// stages are the per-frame stages in the frame's order through the daemon.
func (t *framePathTimes) stages() []namedStage {
	out := []namedStage{{"decode", t.vision.Total(vision.StageDecode)}, {"checks", t.vision.Total(vision.StageChecks)}}
	for _, s := range vision.Stages() {
		out = append(out, namedStage{s.String(), t.vision.Total(s)})
	}
	for _, s := range pipeline.StepStages() {
		if s == pipeline.StepTrack {
			out = append(out, namedStage{"mapping", t.mapping})
		}
		out = append(out, namedStage{s.String(), t.step.Total(s)})
	}
	return out
}

// run plays the clip once through a fresh camera and processor.
func (t *framePathTimes) run(cam config.CameraConfig, cal *homography.Calibration, dc vision.DetectorConfig, bus *config.BusParts, frames int, log *slog.Logger) error {
	vc, err := vision.OpenCamera(vision.SourceConfig{URI: cam.Source}, dc)
	if err != nil {
		return err
	}
	defer vc.Close()
	proc, err := pipeline.New(cam, cal, vc.FPS(), time.Now(), time.Now, log, nil)
	if err != nil {
		return err
	}
	split := 2 * frames / 3
	var hold []image.Rectangle
	for i := 0; ; i++ {
		if i == split {
			vc.SetStageClock(&t.vision)
			proc.Clock = &t.step
		}
		timed := i >= split
		r, err := vc.Next(hold)
		if errors.Is(err, io.EOF) {
			break
		}
		if err != nil {
			return err
		}
		if timed {
			t.timed++
			t0 := time.Now()
			for _, bl := range r.Blobs {
				if s, ok := cal.Surface(homography.Point(bl.Centroid)); ok {
					t.depth += pipeline.FloorPosition(cal, s).Depth
				}
			}
			t.mapping += time.Since(t0)
		}
		msgs, h := proc.Step(r, true)
		hold = h
		t.searched++
		for _, m := range msgs {
			t0 := time.Now()
			if err := bus.Pub.Publish(context.Background(), m.Camera, m.Kind, m.ID, m.Data); err != nil {
				return fmt.Errorf("publish %s: %w", strings.TrimSpace(string(m.Data)), err)
			}
			t.publish += time.Since(t0)
			t.messages++
		}
	}
	if t.timed == 0 {
		return fmt.Errorf("%s: %d frames, none after frame %d", cam.Source, t.searched, split)
	}
	return nil
}

func perFrameMs(d time.Duration, n int) float64 { return float64(d.Microseconds()) / 1000 / float64(n) }
