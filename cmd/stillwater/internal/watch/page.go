package watch

import (
	"context"
	"errors"
	"fmt"
	"image"
	"math"
	"sync"
	"time"

	"stillwater/cmd/stillwater/internal/config"
	"stillwater/cmd/stillwater/internal/console"
	"stillwater/cmd/stillwater/internal/pipeline"
	"stillwater/homography"
	"stillwater/vision"
)

// View is a camera at its latest frame, for the homeowner's page. Pixels
// are the recorded frame's (origin top-left, y down); positions pool
// metres on the water surface.
type View struct {
	JPEG   []byte // the frame undrawn; nil unless asked for
	Frames int64  // frames read up to this one
	Taken  time.Time
	Size   image.Point
	// Config is the calibration and zones the camera runs with now,
	// Calibration the solved one.
	Config      config.CameraConfig
	Calibration *homography.Calibration
	Outline     []homography.Point
	Zones       []console.Zone
	Tracks      []console.Track
	Ignored     int // tracks left out of Tracks: see console.Overlay
}

// viewRequest asks the capture goroutine for a View.
type viewRequest struct {
	jpeg  bool
	reply chan viewReply
}

type viewReply struct {
	v   View
	err error
}

// ErrNoFrame is returned by View when the camera is not delivering
// frames to answer with.
var ErrNoFrame = errors.New("camera is not delivering frames")

// View returns the camera at its latest frame, with the frame as a JPEG
// when jpeg is true. The capture goroutine answers between frames; a
// camera that delivers none within the camera's frame timeout is
// ErrNoFrame.
func (w *Camera) View(ctx context.Context, jpeg bool) (View, error) {
	wait := max(w.frameTimeout(), time.Second)
	t := time.NewTimer(wait)
	defer t.Stop()
	req := viewRequest{jpeg: jpeg, reply: make(chan viewReply, 1)}
	select {
	case w.viewReq <- req:
	case <-t.C:
		return View{}, fmt.Errorf("camera %s: %w", w.Cam.ID, ErrNoFrame)
	case <-ctx.Done():
		return View{}, ctx.Err()
	}
	select {
	case r := <-req.reply:
		return r.v, r.err
	case <-ctx.Done():
		return View{}, ctx.Err()
	}
}

// answerView serves a pending View request; capture goroutine only.
func (w *Camera) answerView(vc *vision.Camera, proc *pipeline.Processor, frames int64) {
	var req viewRequest
	select {
	case req = <-w.viewReq:
	default:
		return
	}
	cam := proc.Camera()
	cal := proc.Calibration
	v := View{Frames: frames, Taken: time.Unix(0, w.lastFrame.Load()), Size: vc.Size(), Config: cam, Calibration: cal}
	for _, p := range pipeline.WaterMask(cal) {
		v.Outline = append(v.Outline, homography.Point{X: p.X, Y: p.Y})
	}
	for _, z := range cam.Zones {
		pz := console.Zone{Name: z.Name}
		for _, p := range z.Pixels {
			pz.Pixels = append(pz.Pixels, p)
		}
		for _, q := range z.PoolM {
			if px, ok := cal.Pixel(homography.Point{X: q[0], Y: q[1]}); ok {
				pz.Pixels = append(pz.Pixels, [2]float64{px.X, px.Y})
			}
		}
		v.Zones = append(v.Zones, pz)
	}
	for _, t := range proc.Tracks {
		if !proc.MayAlarm(t.ID) {
			v.Ignored++
			continue
		}
		b := t.Box
		at := pipeline.Reported(t)
		foot, _ := cal.Pixel(at)
		v.Tracks = append(v.Tracks, console.Track{
			ID: t.ID, Box: [4]float64{float64(b.Min.X), float64(b.Min.Y), float64(b.Dx()), float64(b.Dy())},
			At: [2]float64{foot.X, foot.Y}, X: at.X, Y: at.Y, Alarm: proc.Alarmed(t.ID),
		})
	}
	var err error
	if req.jpeg {
		v.JPEG, err = vc.Snapshot(vision.Annotation{})
	}
	req.reply <- viewReply{v: v, err: err}
}

// Health says how the camera's frames arrive: how many were read, how
// long ago the latest was (by the daemon's clock), and whether the
// watchdog counts the camera as lost.
func (w *Camera) Health(now time.Time) (frames int64, age time.Duration, lost bool) {
	frames = w.Nframes.Load()
	age = now.Sub(time.Unix(0, w.lastFrame.Load()))
	return frames, age, age > w.frameTimeout()
}

// keepWhy keeps, in memory, the features an alarm starting now was
// judged on, under its snapshot's name, for the page's list of alarms.
// Capture goroutine; nothing touches the disk.
func (w *Camera) keepWhy(j evidenceJob, proc *pipeline.Processor) {
	if why := WhyOf(proc.Judged(j.track)); why != nil {
		w.why.put(j.base+".jpg", why)
	}
}

// Why returns the features the alarm whose snapshot is named (in the
// evidence directory) was judged on; nil when not known (an alarm of
// the mixture-model detectors, or one before the latest whyKeep).
func (w *Camera) Why(snapshot string) []console.Feature { return w.why.get(snapshot) }

// whyKeep is how many alarms' features a camera keeps for the page.
const whyKeep = 64

// whyBook holds the latest alarms' features by snapshot name; the zero
// value is empty and ready. Safe for concurrent use.
type whyBook struct {
	mu    sync.Mutex
	order []string
	by    map[string][]console.Feature
}

func (b *whyBook) put(name string, why []console.Feature) {
	b.mu.Lock()
	defer b.mu.Unlock()
	if b.by == nil {
		b.by = map[string][]console.Feature{}
	}
	if _, ok := b.by[name]; !ok {
		b.order = append(b.order, name)
	}
	b.by[name] = why
	for len(b.order) > whyKeep {
		delete(b.by, b.order[0])
		b.order = b.order[1:]
	}
}

func (b *whyBook) get(name string) []console.Feature {
	b.mu.Lock()
	defer b.mu.Unlock()
	return b.by[name]
}

// WhyOf words the features an alarm was judged on (the medians over the
// judge's window, from n candidates) with their units; nil when n is 0.
func WhyOf(f vision.Features, n int, speed float64) []console.Feature {
	if n == 0 {
		return nil
	}
	shade := "darker"
	if f.Contrast > 0 {
		shade = "brighter"
	}
	return []console.Feature{
		{Name: "Body area", Value: fmt.Sprintf("%.3f m² at half contrast (%.3f m² in all)", f.Half, f.Area)},
		{Name: "Size", Value: fmt.Sprintf("%.2f m × %.2f m", f.Length, f.Width)},
		{Name: "Contrast", Value: fmt.Sprintf("%.0f %% %s than the water", 100*math.Abs(f.Contrast), shade)},
		{Name: "Colour", Value: fmt.Sprintf("%.1f from the water's (tint %.0f)", f.Chroma, f.Tint)},
		{Name: "Score", Value: fmt.Sprintf("%.0f (peak %.0f)", f.Score, f.Peak)},
		{Name: "From the edge", Value: fmt.Sprintf("%.2f m", f.Edge)},
		{Name: "On the water", Value: fmt.Sprintf("%.0f %% of it", 100*f.Wet)},
		{Name: "Near end on the deck", Value: fmt.Sprintf("%.2f m out (its end nearest the camera)", f.Foot)},
		{Name: "There in this frame", Value: fmt.Sprintf("%.2f (its difference from the water in this frame over that in the last second)", f.Present)},
		{Name: "Speed", Value: fmt.Sprintf("%.2f m/s", speed)},
		{Name: "Frames judged", Value: fmt.Sprintf("%d", n)},
	}
}
