// Package tuning measures detection against labelled clips: replay runs
// the daemon's pipeline over a clip, score compares its messages with the
// labels, sweep searches detection settings, and the independent
// development clips (pool-holdout-v1) are read and calibrated here.
package tuning

import (
	"bufio"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"image"
	"io"
	"log/slog"
	"math"
	"strconv"
	"strings"
	"time"

	"stillwater/alert"
	"stillwater/cmd/stillwater/internal/config"
	"stillwater/cmd/stillwater/internal/pipeline"
	"stillwater/vision"
	"stillwater/vision/synth"
)

// replayEpoch is the wall time given to media time 0 of a replayed clip, so
// that the same clip gives the same bytes on every run.
func replayEpoch() time.Time { return time.Date(2026, 1, 1, 0, 0, 0, 0, time.UTC) }

// ReplayLine is one line of replay output: the subject and payload the
// daemon would publish, with the clip's frame index and media time.
type ReplayLine struct {
	Subject string          `json:"subject"`
	Frame   int             `json:"frame"`
	Media   float64         `json:"media_s"` // seconds from the first frame
	Msg     json.RawMessage `json:"msg"`     // the bus payload, verbatim
}

// replayStats summarises one replay.
type replayStats struct {
	Frames   int
	Media    time.Duration // media time of the last frame
	Messages int
	Elapsed  time.Duration
}

// CameraFromLabels builds a camera with the default detect settings from a
// label file, using what an installer has: the pool size and the corners A,
// B, C, D as seen on the raw frame, and, where the labels give them (family
// scenes do), the frame size, the chessboard lens, the measured camera
// position and the depth profile. The labels' camera angles and field of
// view are not used: an installer does not measure them.
func CameraFromLabels(t synth.Truth, clip string) (config.CameraConfig, error) {
	if t.Pool.Length <= 0 || t.Pool.Width <= 0 {
		return config.CameraConfig{}, fmt.Errorf("pool %gx%g m: both sides must be positive", t.Pool.Length, t.Pool.Width)
	}
	if len(t.Corners) != 4 {
		return config.CameraConfig{}, fmt.Errorf("%d corners; want A, B, C, D", len(t.Corners))
	}
	cam := config.CameraConfig{
		ID: "clip", Source: clip,
		CalibrationConfig: config.CalibrationConfig{Pool: config.PoolConfig{Length: t.Pool.Length, Width: t.Pool.Width}},
		Detect:            config.DefaultDetect(),
	}
	for _, c := range t.Corners {
		cam.Corners = append(cam.Corners, c.Pixel)
	}
	if t.Lens == nil {
		return cam, nil
	}
	// A family scene: the installer's full calibration.
	if t.Width > 0 && t.Height > 0 {
		cam.Frame = [2]int{t.Width, t.Height}
	}
	l := t.Lens
	cam.Lens = &config.LensConfig{Fx: l.Fx, Fy: l.Fy, Cx: l.Cx, Cy: l.Cy, Dist: append([]float64(nil), l.Dist[:]...)}
	if t.Camera != nil {
		cam.CameraPosition = &config.CameraPositionConfig{X: t.Camera.X, Y: t.Camera.Y, Height: t.Camera.Height}
	}
	if t.Depth != nil {
		w, err := waterFromProfile(*t.Depth)
		if err != nil {
			return config.CameraConfig{}, err
		}
		cam.Water = w
	}
	return cam, nil
}

// waterFromProfile turns a labelled depth profile of one point (a flat
// floor) or two (a slope between them, level beyond) into the depth
// settings an installer would write.
func waterFromProfile(p synth.DepthProfile) (config.WaterConfig, error) {
	switch {
	case len(p.X) != len(p.D):
		return config.WaterConfig{}, fmt.Errorf("depth profile: %d positions and %d depths", len(p.X), len(p.D))
	case len(p.D) == 1:
		return config.WaterConfig{Depth: p.D[0]}, nil
	case len(p.D) == 2:
		x := p.X[1]
		return config.WaterConfig{Shallow: p.D[0], ShallowX: p.X[0], Deep: p.D[1], DeepX: &x}, nil
	}
	return config.WaterConfig{}, fmt.Errorf("depth profile of %d points: want one (flat) or two (a slope)", len(p.D))
}

// replaySink collects a frame's messages.
type replaySink struct {
	prefix string
	enc    *json.Encoder
	n      int
}

func (s *replaySink) write(m pipeline.Message) error {
	s.n++
	return s.enc.Encode(ReplayLine{
		Subject: alert.Subject(s.prefix, m.Camera, m.Kind),
		Frame:   m.Frame,
		Media:   math.Round(m.Media.Seconds()*1e6) / 1e6,
		Msg:     json.RawMessage(m.Data),
	})
}

// ReplayClip runs the daemon's pipeline (the same camera, detector, picture
// checks, processor and step, always armed) over cam.Source and writes each
// message to w: targets, clears, and picture faults raised and cleared. Wall-clock fields of the messages are taken from media time after
// replayEpoch, so the output is reproducible.
func ReplayClip(ctx context.Context, cam config.CameraConfig, prefix string, w io.Writer, log *slog.Logger, opts ...func(*pipeline.Processor)) (replayStats, error) {
	var st replayStats
	start := time.Now()
	cal, err := config.NewCalibration(cam)
	if err != nil {
		return st, err
	}
	dc, err := pipeline.DetectorConfig(cam, cal)
	if err != nil {
		return st, err
	}
	vc, err := vision.OpenCamera(vision.SourceConfig{URI: cam.Source, Deblock: cam.Deblock}, dc)
	if err != nil {
		return st, err
	}
	defer vc.Close()
	epoch := replayEpoch()
	var media time.Duration
	now := func() time.Time { return epoch.Add(media) }
	proc, err := pipeline.New(cam, cal, vc.FPS(), epoch, now, log, nil)
	if err != nil {
		return st, err
	}
	for _, o := range opts {
		o(proc)
	}
	sink := &replaySink{prefix: prefix, enc: json.NewEncoder(w)}
	sink.enc.SetEscapeHTML(false)
	faults := pipeline.NewPictureFaults(vision.HealthConfig{})
	var hold []image.Rectangle
	for {
		if err := ctx.Err(); err != nil {
			return st, err
		}
		r, err := vc.Next(hold)
		if errors.Is(err, io.EOF) {
			break
		}
		if err != nil {
			return st, fmt.Errorf("replay %s: %w", vision.Redact(cam.Source), err)
		}
		media = r.Media
		st.Frames, st.Media = r.Index+1, r.Media
		for _, f := range faults.Observe(r.Media, r.Health, true) {
			// One sequence for every kind, as the daemon numbers them.
			proc.Seq++
			b, err := alert.Encode(alert.NewFault(cam.ID, proc.Seq, epoch.Add(r.Media), f.Kind, f.Active, f.Detail))
			if err != nil {
				return st, fmt.Errorf("replay: encode fault: %w", err)
			}
			if err := sink.write(pipeline.Message{Camera: cam.ID, Kind: alert.KindFault, Data: b, Frame: r.Index, Media: r.Media}); err != nil {
				return st, fmt.Errorf("replay: write output: %w", err)
			}
		}
		if r.Rejoining {
			proc.Step(r, true) // probed only, as in the daemon (see watch.go)
			continue
		}
		proc.Frozen = faults.Frozen()
		proc.StillSince, proc.Still = faults.StillSince()
		msgs, h := proc.Step(r, true)
		hold = h
		for _, m := range msgs {
			if err := sink.write(m); err != nil {
				return st, fmt.Errorf("replay: write output: %w", err)
			}
		}
	}
	st.Messages = sink.n
	st.Elapsed = time.Since(start)
	return st, nil
}

// ReadReplay parses replay output.
func ReadReplay(r io.Reader, name string) ([]ReplayLine, error) {
	var out []ReplayLine
	sc := bufio.NewScanner(r)
	sc.Buffer(make([]byte, 64<<10), 4<<20)
	n := 0
	for sc.Scan() {
		n++
		if len(sc.Bytes()) == 0 {
			continue
		}
		var l ReplayLine
		if err := json.Unmarshal(sc.Bytes(), &l); err != nil {
			return nil, fmt.Errorf("%s:%d: %w", name, n, err)
		}
		if len(l.Msg) == 0 {
			return nil, fmt.Errorf("%s:%d: no msg", name, n)
		}
		out = append(out, l)
	}
	if err := sc.Err(); err != nil {
		return nil, fmt.Errorf("%s: %w", name, err)
	}
	return out, nil
}

// ExplainOption reads the labels and returns the replay option that
// explains the frames listed in why ("120,121"), and with verbose every
// unreported frame at most once a second, on w.
func ExplainOption(labels, why string, verbose bool, w io.Writer) (func(*pipeline.Processor), error) {
	t, err := ReadLabels(labels)
	if err != nil {
		return nil, err
	}
	var frames []int
	for _, f := range strings.FieldsFunc(why, func(r rune) bool { return r == ',' || r == ' ' }) {
		n, err := strconv.Atoi(f)
		if err != nil || n < 0 {
			return nil, fmt.Errorf("-why %q: %q is not a frame number", why, f)
		}
		frames = append(frames, n)
	}
	every := time.Duration(0)
	if verbose {
		every = time.Second
	}
	e := pipeline.NewExplainer(t, DefaultScoreRules().FarM, w, every, frames)
	return func(p *pipeline.Processor) { p.Explain = e.Frame }, nil
}
