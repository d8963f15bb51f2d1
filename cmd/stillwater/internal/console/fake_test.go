package console

import (
	"bytes"
	"context"
	"fmt"
	"image"
	"image/color"
	"image/jpeg"
	"io/fs"
	"sync"
	"testing"
	"testing/fstest"
	"time"

	"stillwater/alert/arming"
	"stillwater/homography"
)

// fakeBackend is one made-up camera, "deck", looking down at a 10 m × 5 m
// pool drawn as a quadrilateral on a 640×360 frame. Arming is a real
// arming.Arming, so that the control API acts on what the page shows.
type fakeBackend struct {
	arm *arming.Arming
	now func() time.Time

	mu       sync.Mutex
	seq      uint64
	cal      CalibrationInput
	saved    []CalibrationInput
	previews []CalibrationInput
	events   []Event
	files    fstest.MapFS
}

// fakeFrame is the fake camera's frame size and fakeCorners its pool's
// corners A, B, C, D in pixels (the far side narrower, as a camera above
// the near end sees it).
var (
	fakeFrame   = [2]int{640, 360}
	fakeCorners = [][2]float64{{110, 300}, {530, 300}, {450, 90}, {190, 90}}
)

func newFakeBackend(t testing.TB, now func() time.Time) *fakeBackend {
	t.Helper()
	a, err := arming.New(arming.Config{Cameras: []string{"deck"}}, now())
	if err != nil {
		t.Fatal(err)
	}
	snap, err := fakeJPEG(0, nil)
	if err != nil {
		t.Fatal(err)
	}
	at := now().Add(-3 * time.Minute)
	pos := [2]float64{6.2, 2.4}
	return &fakeBackend{
		arm: a, now: now,
		cal: CalibrationInput{Corners: fakeCorners, Length: 10, Width: 5},
		events: []Event{
			{ID: "deck-1-alarm", Kind: EventAlarm, Camera: "deck", Time: at, Text: "Someone in the water while armed.", Track: 3, Position: &pos,
				Snapshot: "deck-20261202T101500000Z-track3.jpg", Clip: "deck-20261202T101500000Z-track3.mp4",
				Why: []Feature{{Name: "Body area", Value: "0.210 m²"}, {Name: "Contrast", Value: "38 % darker than the water"}, {Name: "Speed", Value: "0.40 m/s"}}},
			{ID: "deck-2-fault", Kind: EventFault, Camera: "deck", Time: at.Add(-time.Hour), Text: "No frame from the camera for 6.0 s."},
		},
		files: fstest.MapFS{
			"deck-20261202T101500000Z-track3.jpg": {Data: snap},
			"deck-20261202T101500000Z-track3.mp4": {Data: []byte("not a real clip")},
			"notes.txt":                           {Data: []byte("private")},
		},
	}
}

// fakeJPEG draws the pool, and a bar whose place moves with seq so that
// successive frames differ; mark, when set, is a track's box.
func fakeJPEG(seq uint64, mark *image.Rectangle) ([]byte, error) {
	var b bytes.Buffer
	if err := jpeg.Encode(&b, fakeImage(seq, mark), &jpeg.Options{Quality: 80}); err != nil {
		return nil, fmt.Errorf("encode fake frame: %w", err)
	}
	return b.Bytes(), nil
}

func fakeImage(seq uint64, mark *image.Rectangle) *image.RGBA {
	w, h := fakeFrame[0], fakeFrame[1]
	img := image.NewRGBA(image.Rect(0, 0, w, h))
	deck := color.RGBA{196, 186, 168, 255}
	water := color.RGBA{40, 120, 170, 255}
	for y := range h {
		for x := range w {
			c := deck
			if inQuad(fakeCorners, float64(x), float64(y)) {
				c = water
			}
			if mark != nil && image.Pt(x, y).In(*mark) {
				c = color.RGBA{220, 80, 60, 255}
			}
			img.SetRGBA(x, y, c)
		}
	}
	bar := int(seq*37) % w
	for y := h - 12; y < h; y++ {
		for x := bar; x < min(bar+40, w); x++ {
			img.SetRGBA(x, y, color.RGBA{20, 20, 20, 255})
		}
	}
	return img
}

// inQuad reports whether (x, y) is inside the convex quadrilateral q.
func inQuad(q [][2]float64, x, y float64) bool {
	sign := 0.0
	for i := range q {
		a, b := q[i], q[(i+1)%len(q)]
		c := (b[0]-a[0])*(y-a[1]) - (b[1]-a[1])*(x-a[0])
		if c == 0 {
			continue
		}
		if sign == 0 {
			sign = c
		} else if (c > 0) != (sign > 0) {
			return false
		}
	}
	return true
}

var _ Backend = (*fakeBackend)(nil)

func (f *fakeBackend) Cameras(ctx context.Context) []CameraStatus {
	st := f.arm.Status(f.now())
	var out []CameraStatus
	for _, r := range st.Cameras {
		out = append(out, CameraStatus{
			ID: r.Camera, Health: HealthWatching, FPS: 12.5, FrameAge: 0.08,
			Armed: r.Armed, ArmedWhy: r.Reason, NextChange: r.NextChange, Override: r.Override != nil, Frame: fakeFrame,
		})
	}
	return out
}

func (f *fakeBackend) Overlay(ctx context.Context, camera string) (Overlay, error) {
	if camera != "deck" {
		return Overlay{}, fmt.Errorf("camera %q: %w", camera, ErrNoCamera)
	}
	return Overlay{
		Frame:   fakeFrame,
		Outline: fakeCorners,
		Zones:   []Zone{{Name: "ladder", Pixels: [][2]float64{{480, 260}, {520, 260}, {515, 290}, {485, 290}}}},
		Tracks:  []Track{{ID: 3, Box: [4]float64{300, 170, 40, 50}, At: [2]float64{320, 220}, X: 6.2, Y: 2.4, Alarm: true}},
		Ignored: 4,
	}, nil
}

func (f *fakeBackend) Frame(ctx context.Context, camera string) (Frame, error) {
	if camera != "deck" {
		return Frame{}, fmt.Errorf("camera %q: %w", camera, ErrNoCamera)
	}
	f.mu.Lock()
	f.seq++
	seq := f.seq
	f.mu.Unlock()
	box := image.Rect(300, 170, 340, 220)
	b, err := fakeJPEG(seq, &box)
	if err != nil {
		return Frame{}, err
	}
	return Frame{JPEG: b, Seq: seq, Taken: f.now()}, nil
}

func (f *fakeBackend) Events(ctx context.Context, n int) []Event {
	f.mu.Lock()
	defer f.mu.Unlock()
	return append([]Event(nil), f.events[:min(n, len(f.events))]...)
}

func (f *fakeBackend) Evidence() fs.FS { return f.files }

func (f *fakeBackend) Calibration(ctx context.Context, camera string) (CalibrationInput, error) {
	if camera != "deck" {
		return CalibrationInput{}, fmt.Errorf("camera %q: %w", camera, ErrNoCamera)
	}
	f.mu.Lock()
	defer f.mu.Unlock()
	return f.cal, nil
}

// solve is the fake's calibration: the plain four-point homography, with
// a corner outside the frame refused as the daemon refuses it.
func (f *fakeBackend) solve(in CalibrationInput) (homography.H, error) {
	for i, p := range in.Corners {
		if p[0] < 0 || p[1] < 0 || p[0] > float64(fakeFrame[0]) || p[1] > float64(fakeFrame[1]) {
			return homography.H{}, &CalibrationError{Field: "corners", Point: i, Msg: fmt.Sprintf("corner %c (%g, %g) is outside the %d×%d frame", 'A'+i, p[0], p[1], fakeFrame[0], fakeFrame[1])}
		}
	}
	if in.Length <= 0 {
		return homography.H{}, &CalibrationError{Field: "length_m", Point: -1, Msg: "must be positive metres"}
	}
	px := make([]homography.Point, 4)
	for i, p := range in.Corners {
		px[i] = homography.Point{X: p[0], Y: p[1]}
	}
	L, W := in.Length, in.Width
	h, err := homography.Solve(px, []homography.Point{{}, {X: L}, {X: L, Y: W}, {Y: W}})
	if err != nil {
		return h, &CalibrationError{Field: "corners", Point: -1, Msg: err.Error()}
	}
	return h, nil
}

func (f *fakeBackend) PreviewCalibration(ctx context.Context, camera string, in CalibrationInput) (Preview, error) {
	f.mu.Lock()
	f.previews = append(f.previews, in)
	f.mu.Unlock()
	h, err := f.solve(in)
	if err != nil {
		return Preview{}, err
	}
	inv, err := h.Inverse()
	if err != nil {
		return Preview{}, err
	}
	corners := make([]homography.Point, len(in.Corners))
	for i, c := range in.Corners {
		corners[i] = homography.Point{X: c[0], Y: c[1]}
	}
	p := PreviewOf(planeSolved{toPool: h, toPx: inv, length: in.Length, width: in.Width, corners: corners}, fakeFrame)
	if p.Rectified, err = fakeRectify(fakeImage(0, nil), inv, in.Length, in.Width, 30); err != nil {
		return Preview{}, err
	}
	p.PPM = 30
	return p, nil
}

// planeSolved is a calibration that is a plain homography: no lens, no
// refraction.
type planeSolved struct {
	toPool, toPx  homography.H
	length, width float64
	corners       []homography.Point
}

func (p planeSolved) Pixel(s homography.Point) (homography.Point, bool) { return p.toPx.Map(s) }
func (p planeSolved) MetresPerPixel(px homography.Point) float64 {
	return homography.MetresPerPixel(p.toPool, px)
}
func (p planeSolved) Size() (float64, float64)    { return p.length, p.width }
func (p planeSolved) Corners() []homography.Point { return p.corners }

// fakeRectify samples the top-down view at ppm pixels per metre, with
// 1 m of deck round the pool, nearest pixel: toPx maps pool metres to
// frame pixels.
func fakeRectify(frame *image.RGBA, toPx homography.H, length, width, ppm float64) ([]byte, error) {
	w, h := int(ppm*(length+2)), int(ppm*(width+2))
	out := image.NewRGBA(image.Rect(0, 0, w, h))
	for v := range h {
		for u := range w {
			q, ok := toPx.Map(homography.Point{X: float64(u)/ppm - 1, Y: float64(v)/ppm - 1})
			if ok && image.Pt(int(q.X), int(q.Y)).In(frame.Bounds()) {
				out.SetRGBA(u, v, frame.RGBAAt(int(q.X), int(q.Y)))
			}
		}
	}
	var b bytes.Buffer
	if err := jpeg.Encode(&b, out, &jpeg.Options{Quality: 80}); err != nil {
		return nil, fmt.Errorf("encode rectified view: %w", err)
	}
	return b.Bytes(), nil
}

func (f *fakeBackend) SaveCalibration(ctx context.Context, camera string, in CalibrationInput) error {
	if _, err := f.solve(in); err != nil {
		return err
	}
	f.mu.Lock()
	defer f.mu.Unlock()
	f.cal = in
	f.saved = append(f.saved, in)
	return nil
}

func (f *fakeBackend) savedCalibrations() []CalibrationInput {
	f.mu.Lock()
	defer f.mu.Unlock()
	return append([]CalibrationInput(nil), f.saved...)
}

func (f *fakeBackend) lastPreview() (CalibrationInput, bool) {
	f.mu.Lock()
	defer f.mu.Unlock()
	if len(f.previews) == 0 {
		return CalibrationInput{}, false
	}
	return f.previews[len(f.previews)-1], true
}
