package synth

import (
	"context"
	"fmt"
	"math"
	"path/filepath"
)

// Event is something in a family scene besides the intruder, for reading
// a detector's false alarms against: a gust, a cloud shadow edge crossing,
// a bird, a walker, leaves.
type Event struct {
	Kind string  `json:"kind"`
	From float64 `json:"from_s"`
	To   float64 `json:"to_s"`
	Note string  `json:"note,omitempty"`
}

// renderWorld draws a family scene and encodes it through ffmpeg.
func renderWorld(ctx context.Context, s Scene, videoPath string) (Truth, error) {
	n := s.frameCount()
	r := newWRenderer(s)
	truth := r.labels(filepath.Base(videoPath))
	sink, err := openFFmpeg(ctx, videoPath, s.Width, s.Height, s.FPS, s.World.Encoding)
	if err != nil {
		return Truth{}, fmt.Errorf("render: %w", err)
	}
	for i := 0; i < n; i++ {
		if err := ctx.Err(); err != nil {
			_ = sink.Close()
			return Truth{}, err
		}
		ft, err := r.frame(i)
		if err != nil {
			_ = sink.Close()
			return Truth{}, fmt.Errorf("render: frame %d: %w", i, err)
		}
		truth.PerFrame = append(truth.PerFrame, ft)
		if err := sink.Write(r.out); err != nil {
			return Truth{}, fmt.Errorf("render: frame %d: %w", i, err)
		}
	}
	if err := sink.Close(); err != nil {
		return Truth{}, fmt.Errorf("render: %w", err)
	}
	truth.Presence = presenceFrom(truth.PerFrame, s.FPS)
	return truth, nil
}

// labels starts a family scene's truth: what an installer would have
// (corners clicked on the raw frame, chessboard intrinsics, the measured
// camera position, pool size and depth) and the scene's events.
func (r *wRenderer) labels(clip string) Truth {
	s := r.s
	w := r.w
	t := Truth{
		Format: LabelFormat, Clip: clip, FPS: s.FPS, Width: s.Width, Height: s.Height,
		Frames: s.frameCount(), Pool: PoolSize{s.PoolLength, s.PoolWidth},
		Seed: s.Seed, Variant: w.Variant, Renderer: RendererVersion,
	}
	pose := s.Camera
	t.Camera = &pose
	lens := w.Lens
	t.Lens = &lens
	depth := w.Site.Depth
	t.Depth = &depth
	t.DeckHeight = round6(w.Site.DeckHeight)
	t.Night = w.Light.Night
	for _, k := range []struct {
		name string
		x, y float64
	}{{"A", 0, 0}, {"B", s.PoolLength, 0}, {"C", s.PoolLength, s.PoolWidth}, {"D", 0, s.PoolWidth}} {
		u, v, _ := r.cam.project(k.x, k.y, 0)
		t.Corners = append(t.Corners, Corner{Name: k.name, Pool: [2]float64{k.x, k.y}, Pixel: [2]float64{round6(u), round6(v)}})
	}
	t.Faults = append(t.Faults, w.Faults...)
	for _, g := range w.Wind.Gusts {
		t.Events = append(t.Events, Event{Kind: "gust", From: round6(g.Start), To: round6(g.Start + g.Dur), Note: fmt.Sprintf("ripples ×%.1f, band %.0f m at %.1f m/s", g.Gain, g.WidthM, g.SpeedMS)})
	}
	if c := w.Clouds; c != nil {
		t.Events = append(t.Events, Event{Kind: "cloud", From: 0, To: s.Duration, Note: fmt.Sprintf("shadow edge crosses the pool centre at %.1f s, moving %.1f m/s; %.0f %% of the sun blocked", c.Cross, c.SpeedMS, 100*c.Block)})
	}
	if len(w.Leaves) > 0 {
		t.Events = append(t.Events, Event{Kind: "leaves", From: 0, To: s.Duration, Note: fmt.Sprintf("%d leaves on the water", len(w.Leaves))})
	}
	for _, b := range w.Birds {
		where := "coping"
		if b.OnWater {
			where = "water"
		}
		t.Events = append(t.Events, Event{Kind: "bird", From: round6(b.Start), To: round6(math.Min(s.Duration, b.Start+4+b.Stay)),
			Note: fmt.Sprintf("sits on the %s at (%.2f, %.2f) for %.1f s", where, b.X, b.Y, b.Stay)})
	}
	for _, wk := range w.Walkers {
		if len(wk.Path) > 0 {
			t.Events = append(t.Events, Event{Kind: "walker", From: round6(wk.Path[0].T), To: round6(wk.Path[len(wk.Path)-1].T), Note: "adult on the deck"})
		}
	}
	return t
}
