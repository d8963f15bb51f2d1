// Package vision turns video frames into foreground blobs. It is the only
// package that uses OpenCV: every gocv value is owned here and nothing of
// gocv's leaves it. Coordinates it returns are pixels of the full-resolution
// source frame, origin top-left, x right, y down.
package vision

import (
	"errors"
	"fmt"
	"image"
	"image/color"
	"math"

	"gocv.io/x/gocv"
)

var (
	white = color.RGBA{255, 255, 255, 0}
	black = color.RGBA{0, 0, 0, 0}
)

// Point is a position in pixels of the source frame (origin top-left, y down).
type Point struct {
	X, Y float64
}

// Blob is one connected foreground region.
type Blob struct {
	Centroid Point           // area-weighted centre, source pixels
	Area     float64         // source pixels², counted foreground pixels (mog2, knn)
	Pixels   int             // foreground pixels at processing size (cells for meanvar)
	Box      image.Rectangle // bounding box, source pixels
	Contour  []Point         // outer contour, source pixels
	// Plane is set by the rectified (meanvar) detector: the candidate's
	// position in the caller's plane units and its cells.
	Plane *PlaneBlob
	// Features are what the rectified detector measured (zero for mog2
	// and knn).
	Features Features
}

// DetectorConfig sets up background subtraction and blob extraction.
type DetectorConfig struct {
	// Grid, with Method "meanvar" (or empty), selects the mean–variance
	// detector on the rectified pool (meanvar.go); the fields below up to
	// MinArea then do not apply, except Method.
	Grid *Rectification
	// MeanVar tunes the mean–variance detector.
	MeanVar MeanVarConfig
	// Reference, when set, is the empty pool the mean–variance detector
	// starts from (and restarts from after a reconnect that changed the
	// view), so that it watches from the first second.
	Reference *Reference
	// ProcessWidth is the width frames are scaled to before processing, px.
	// Zero keeps the source width.
	ProcessWidth int
	// Method is "meanvar" (the default with a Grid), or the earlier
	// mixture models on the camera view, "mog2" (the default without one)
	// or "knn".
	Method string
	// History is the number of frames the model remembers (OpenCV default 500).
	History int
	// Threshold is MOG2's varThreshold (default 16) or KNN's dist2Threshold
	// (default 400).
	Threshold float64
	// LearningRate for the background; negative selects OpenCV's automatic
	// rate (1/history after start-up).
	LearningRate float64
	// MinPixels drops blobs smaller than this many pixels at processing
	// size before any physical gating (noise floor).
	MinPixels float64
	// Mask is the region to watch as a polygon in source pixels; outside it
	// nothing is reported. Empty watches the whole frame.
	Mask []Point
	// Exclude are polygons in source pixels that never report.
	Exclude [][]Point
	// SceneChangeFraction of the watched area turning foreground at once is
	// treated as a scene-wide change (cloud, lights, exposure): the model
	// relearns fast and no blobs are reported. Zero selects 0.35.
	SceneChangeFraction float64
	// WarmUp is the number of first frames that only train the model: a
	// model that has seen a few frames marks most moving water as
	// foreground. Zero selects 25 (2.5 s at 10 fps); negative is none.
	WarmUp int
	// PixelArea, when set, gives the plane area (the caller's units²;
	// stillwater uses m²) that one source pixel covers at a source pixel.
	// With MinArea it makes the noise clean-up scale-aware: where a blob of
	// MinArea would be too few pixels to survive the 3×3 opening (far from
	// a low camera), the opening is skipped and the caller's size gate in
	// plane units does the work.
	PixelArea func(Point) float64
	// MinArea is the smallest blob the caller wants, plane units².
	MinArea float64
}

// openMinPixels is the fewest processing pixels a blob of MinArea must
// cover for the 3×3 opening to be applied there: a 5×5 px patch, below
// which thin or foreshortened bodies lose most of their pixels to it.
const openMinPixels = 25

// fineCell is the grid step, processing px, at which PixelArea is sampled.
const fineCell = 8

// FrameStats describes one processed frame.
type FrameStats struct {
	// ForegroundFraction is the share of the watched area marked foreground.
	ForegroundFraction float64
	// SceneChange is true when the frame was judged a scene-wide change.
	SceneChange bool
	// Relearning is true while the model is catching up after a scene change.
	Relearning bool
	// WarmingUp is true for the first frames, which only train the model.
	WarmingUp bool
	// MeanLevel is the mean grey level inside the watched area, 0–255.
	MeanLevel float64
	// Glints is the number of saturated pixels suppressed.
	Glints int
	// Highlights is the number of blobs dropped for being brighter than the
	// water (caustics, reflections).
	Highlights int
}

// Detector owns a background model and the per-stream Mats. It is not safe
// for concurrent use. Close frees it.
type Detector struct {
	cfg      DetectorConfig
	src      image.Point // source frame size
	size     image.Point // processing size
	scale    float64     // source px per processing px
	kind     int         // bgMOG2 or bgKNN
	bg       *background
	mask     gocv.Mat
	prevGray gocv.Mat // the previous probed frame, grey (see probe)
	maskArea int
	small    gocv.Mat
	gray     gocv.Mat
	fg       gocv.Mat
	bin      gocv.Mat
	learnImg gocv.Mat
	bgImg    gocv.Mat
	hold     gocv.Mat
	glint    gocv.Mat
	dark     gocv.Mat
	kOpen    gocv.Mat
	kGlint   gocv.Mat
	kClose   gocv.Mat
	kFill    gocv.Mat // erosion that keeps only flat areas of decoder grey (see probe)
	fine     gocv.Mat // 255 where the opening is skipped (see PixelArea)
	hasFine  bool
	opened   gocv.Mat
	relearn  int
	frames   int
	closed   bool
}

// glintLevel is the grey level above which a pixel is taken as a specular
// highlight of the sun or a lamp on the water.
const glintLevel = 235

// ErrEmptyFrame is returned for a frame with no pixels.
var ErrEmptyFrame = errors.New("empty frame")

// frameDetector is what a Camera runs over its frames: the mean–variance
// detector on the rectified pool, or the earlier mixture-model Detector.
type frameDetector interface {
	Detect(frame gocv.Mat, hold []image.Rectangle) ([]Blob, FrameStats, error)
	probe(frame gocv.Mat) (probeStats, error)
	reset() error
	// resume follows a reconnect that found the same picture: the
	// background is kept, but nothing from before the gap may be compared
	// with what comes after it.
	resume() error
	srcSize() image.Point
	Close() error
}

// newFrameDetector sets up the detector cfg names for frames of size src.
func newFrameDetector(cfg DetectorConfig, src image.Point) (frameDetector, error) {
	switch {
	case cfg.Method == "meanvar" || (cfg.Method == "" && cfg.Grid != nil):
		d, err := newMeanVar(cfg, src)
		if err != nil {
			return nil, fmt.Errorf("new detector: %w", err)
		}
		return d, nil
	default:
		return NewDetector(cfg, src)
	}
}

func (d *Detector) srcSize() image.Point { return d.src }

// NewDetector prepares a detector for frames of the given source size.
func NewDetector(cfg DetectorConfig, src image.Point) (*Detector, error) {
	if src.X <= 0 || src.Y <= 0 {
		return nil, fmt.Errorf("new detector: frame size %v is not positive", src)
	}
	if cfg.History <= 0 {
		cfg.History = 500
	}
	kind := bgMOG2
	switch cfg.Method {
	case "", "mog2":
		if cfg.Threshold <= 0 {
			cfg.Threshold = 16
		}
	case "knn":
		kind = bgKNN
		if cfg.Threshold <= 0 {
			cfg.Threshold = 400
		}
	default:
		return nil, fmt.Errorf("new detector: unknown method %q (want mog2 or knn)", cfg.Method)
	}
	if cfg.SceneChangeFraction <= 0 {
		cfg.SceneChangeFraction = 0.35
	}
	if cfg.WarmUp == 0 {
		cfg.WarmUp = 25
	}
	d := &Detector{cfg: cfg, src: src}
	d.size = src
	if cfg.ProcessWidth > 0 && cfg.ProcessWidth < src.X {
		d.size = image.Pt(cfg.ProcessWidth, int(math.Round(float64(src.Y)*float64(cfg.ProcessWidth)/float64(src.X))))
	}
	d.scale = float64(src.X) / float64(d.size.X)
	d.kind = kind
	d.bg = newBackground(kind, cfg.History, cfg.Threshold, true)
	d.prevGray = gocv.NewMat()
	d.mask = gocv.NewMatWithSize(d.size.Y, d.size.X, gocv.MatTypeCV8U)
	d.small = gocv.NewMat()
	d.gray = gocv.NewMat()
	d.fg = gocv.NewMat()
	d.bin = gocv.NewMat()
	d.learnImg = gocv.NewMat()
	d.bgImg = gocv.NewMat()
	d.hold = gocv.NewMatWithSize(d.size.Y, d.size.X, gocv.MatTypeCV8U)
	d.glint = gocv.NewMat()
	d.dark = gocv.NewMat()
	d.kGlint = gocv.GetStructuringElement(gocv.MorphEllipse, image.Pt(7, 7))
	d.kOpen = gocv.GetStructuringElement(gocv.MorphEllipse, image.Pt(3, 3))
	d.kClose = gocv.GetStructuringElement(gocv.MorphEllipse, image.Pt(7, 7))
	d.kFill = gocv.GetStructuringElement(gocv.MorphRect, image.Pt(fillBlock, fillBlock))
	d.fine = gocv.NewMatWithSize(d.size.Y, d.size.X, gocv.MatTypeCV8U)
	d.opened = gocv.NewMat()
	d.buildMask()
	d.buildFine()
	return d, nil
}

// buildFine marks the processing pixels where a blob of cfg.MinArea would
// cover fewer than openMinPixels pixels.
func (d *Detector) buildFine() {
	d.fine.SetTo(gocv.NewScalar(0, 0, 0, 0))
	if d.cfg.PixelArea == nil || d.cfg.MinArea <= 0 {
		return
	}
	for y := 0; y < d.size.Y; y += fineCell {
		for x := 0; x < d.size.X; x += fineCell {
			c := Point{(float64(x) + fineCell/2) * d.scale, (float64(y) + fineCell/2) * d.scale}
			a := d.cfg.PixelArea(c) * d.scale * d.scale // plane area of one processing pixel
			if !(a > 0) || math.IsInf(a, 0) || d.cfg.MinArea/a >= openMinPixels {
				continue
			}
			r := image.Rect(x, y, x+fineCell, y+fineCell).Intersect(image.Rect(0, 0, d.size.X, d.size.Y))
			gocv.Rectangle(&d.fine, r, white, -1)
			d.hasFine = true
		}
	}
}

func (d *Detector) toProc(pts []Point) []image.Point {
	out := make([]image.Point, len(pts))
	for i, p := range pts {
		out[i] = image.Pt(int(math.Round(p.X/d.scale)), int(math.Round(p.Y/d.scale)))
	}
	return out
}

func (d *Detector) buildMask() {
	if len(d.cfg.Mask) >= 3 {
		d.mask.SetTo(gocv.NewScalar(0, 0, 0, 0))
		pv := gocv.NewPointsVectorFromPoints([][]image.Point{d.toProc(d.cfg.Mask)})
		gocv.FillPoly(&d.mask, pv, white)
		pv.Close()
	} else {
		d.mask.SetTo(gocv.NewScalar(255, 0, 0, 0))
	}
	for _, ex := range d.cfg.Exclude {
		if len(ex) < 3 {
			continue
		}
		pv := gocv.NewPointsVectorFromPoints([][]image.Point{d.toProc(ex)})
		gocv.FillPoly(&d.mask, pv, black)
		pv.Close()
	}
	d.maskArea = gocv.CountNonZero(d.mask)
}

// Size returns the processing size in pixels.
func (d *Detector) Size() image.Point { return d.size }

// Detect updates the background model with frame (BGR or grey, source
// size) and returns the foreground blobs inside the mask. Pixels inside the
// hold boxes (source pixels: live tracks and pending alarms) are not learned
// into the background, so a still intruder is never absorbed.
func (d *Detector) Detect(frame gocv.Mat, hold []image.Rectangle) ([]Blob, FrameStats, error) {
	var st FrameStats
	if err := d.prepare(frame); err != nil {
		return nil, st, err
	}
	// The model sees colour: skin and swimsuits differ from water more in
	// hue than in brightness.
	img := d.small
	st.MeanLevel = d.gray.MeanWithMask(d.mask).Val1

	lr := d.cfg.LearningRate
	if d.relearn > 0 {
		lr = 0.25
		st.Relearning = true
	}
	held := d.paintHold(hold)
	if held && d.frames > 0 {
		// Detect without learning, then learn from a copy in which the held
		// pixels are replaced by the current background estimate.
		if err := d.bg.apply(img, &d.fg, 0); err != nil {
			return nil, st, err
		}
		if err := d.bg.image(&d.bgImg); err != nil {
			return nil, st, err
		}
		img.CopyTo(&d.learnImg)
		d.bgImg.CopyToWithMask(&d.learnImg, d.hold)
		if err := d.bg.apply(d.learnImg, &d.bin, lr); err != nil {
			return nil, st, err
		}
	} else if err := d.bg.apply(img, &d.fg, lr); err != nil {
		return nil, st, err
	}
	d.frames++

	// Shadows are 127 in the mask; keep only confident foreground.
	gocv.Threshold(d.fg, &d.bin, 200, 255, gocv.ThresholdBinary)
	gocv.BitwiseAnd(d.bin, d.mask, &d.bin)
	// Specular glints: near-saturated pixels and their halo are never
	// foreground; a person in the water is not a mirror.
	gocv.Threshold(d.gray, &d.glint, glintLevel, 255, gocv.ThresholdBinary)
	if n := gocv.CountNonZero(d.glint); n > 0 {
		st.Glints = n
		gocv.Dilate(d.glint, &d.glint, d.kGlint)
		gocv.BitwiseNot(d.glint, &d.glint)
		gocv.BitwiseAnd(d.bin, d.glint, &d.bin)
	}
	if d.hasFine {
		// Keep the unopened mask where the pixels are coarse.
		gocv.MorphologyEx(d.bin, &d.opened, gocv.MorphOpen, d.kOpen)
		gocv.BitwiseAnd(d.bin, d.fine, &d.bin)
		gocv.BitwiseOr(d.bin, d.opened, &d.bin)
	} else {
		gocv.MorphologyEx(d.bin, &d.bin, gocv.MorphOpen, d.kOpen)
	}
	gocv.MorphologyEx(d.bin, &d.bin, gocv.MorphClose, d.kClose)

	if d.maskArea > 0 {
		st.ForegroundFraction = float64(gocv.CountNonZero(d.bin)) / float64(d.maskArea)
	}
	if st.ForegroundFraction > d.cfg.SceneChangeFraction {
		st.SceneChange = true
		if d.relearn < 10 {
			d.relearn = 10
		}
		return nil, st, nil
	}
	if d.relearn > 0 {
		d.relearn--
		if st.Relearning {
			return nil, st, nil
		}
	}
	if d.frames <= d.cfg.WarmUp {
		st.WarmingUp = true
		return nil, st, nil
	}
	// Pixels clearly darker than the background in at least one colour
	// channel: caustics and reflections brighten water in every channel, so
	// a blob with almost none of these is a highlight, not a body.
	if err := d.bg.image(&d.bgImg); err != nil {
		return nil, st, err
	}
	// Compare against the background scaled to this frame's light: under a
	// cloud all the water is darker than the model learned in the sun, and
	// light scales every pixel's level by about the same factor.
	if g := d.gain(); math.Abs(g-1) > 0.02 {
		d.bgImg.ConvertToWithParams(&d.bgImg, d.bgImg.Type(), float32(g), 0)
	}
	gocv.Subtract(d.bgImg, d.small, &d.dark)
	if d.dark.Channels() == 3 {
		ch := gocv.Split(d.dark)
		gocv.Max(ch[0], ch[1], &d.dark)
		gocv.Max(d.dark, ch[2], &d.dark)
		for i := range ch {
			ch[i].Close()
		}
	}
	gocv.Threshold(d.dark, &d.dark, darkDelta, 255, gocv.ThresholdBinary)
	gocv.BitwiseAnd(d.dark, d.bin, &d.dark)
	blobs, highlights := d.blobs()
	st.Highlights = highlights
	return blobs, st, nil
}

// prepare scales the frame to the processing size into d.small and its
// grey version into d.gray.
func (d *Detector) prepare(frame gocv.Mat) error {
	if frame.Empty() {
		return ErrEmptyFrame
	}
	if frame.Cols() != d.src.X || frame.Rows() != d.src.Y {
		return fmt.Errorf("detect: frame is %dx%d, detector was set up for %dx%d", frame.Cols(), frame.Rows(), d.src.X, d.src.Y)
	}
	if d.size != d.src {
		gocv.Resize(frame, &d.small, d.size, 0, 0, gocv.InterpolationArea)
	} else {
		frame.CopyTo(&d.small)
	}
	if d.small.Channels() == 3 {
		gocv.CvtColor(d.small, &d.gray, gocv.ColorBGRToGray)
	} else {
		d.small.CopyTo(&d.gray)
	}
	return nil
}

// gain is the ratio of the frame's mean level to the background
// estimate's inside the watched area (1 when either is black).
func (d *Detector) gain() float64 {
	f, b := d.small.MeanWithMask(d.mask), d.bgImg.MeanWithMask(d.mask)
	fs, bs := f.Val1+f.Val2+f.Val3, b.Val1+b.Val2+b.Val3
	if fs <= 0 || bs <= 0 {
		return 1
	}
	return fs / bs
}

// darkDelta is how many grey levels below the background a pixel must be
// to count as darker than the water there.
const darkDelta = 12

// minDarkShare is the least share of a blob's pixels that must be darker
// than the background for it to be reported.
const minDarkShare = 0.2

func (d *Detector) paintHold(hold []image.Rectangle) bool {
	if len(hold) == 0 {
		return false
	}
	d.hold.SetTo(gocv.NewScalar(0, 0, 0, 0))
	any := false
	for _, r := range hold {
		pr := image.Rect(
			int(math.Floor(float64(r.Min.X)/d.scale)), int(math.Floor(float64(r.Min.Y)/d.scale)),
			int(math.Ceil(float64(r.Max.X)/d.scale)), int(math.Ceil(float64(r.Max.Y)/d.scale)),
		).Intersect(image.Rect(0, 0, d.size.X, d.size.Y))
		if pr.Empty() {
			continue
		}
		gocv.Rectangle(&d.hold, pr, white, -1)
		any = true
	}
	return any
}

func (d *Detector) blobs() ([]Blob, int) {
	contours := gocv.FindContours(d.bin, gocv.RetrievalExternal, gocv.ChainApproxSimple)
	defer contours.Close()
	var out []Blob
	highlights := 0
	for i := 0; i < contours.Size(); i++ {
		c := contours.At(i)
		pr := gocv.BoundingRect(c)
		// Gate on counted pixels, not the contour's polygon area: a thin,
		// foreshortened body far from a low camera has a polygon area near
		// zero however many pixels it covers.
		roi := d.bin.Region(pr)
		px := gocv.CountNonZero(roi)
		roi.Close()
		if px == 0 || float64(px) < d.cfg.MinPixels {
			continue
		}
		roi = d.dark.Region(pr)
		darkPx := gocv.CountNonZero(roi)
		roi.Close()
		if float64(darkPx) < minDarkShare*float64(px) {
			highlights++
			continue
		}
		pts := c.ToPoints()
		poly := make([]Point, len(pts))
		for j, p := range pts {
			poly[j] = Point{float64(p.X) * d.scale, float64(p.Y) * d.scale}
		}
		box := image.Rect(int(float64(pr.Min.X)*d.scale), int(float64(pr.Min.Y)*d.scale), int(math.Ceil(float64(pr.Max.X)*d.scale)), int(math.Ceil(float64(pr.Max.Y)*d.scale)))
		cen, ok := polygonCentroid(poly)
		if !ok {
			// A one-pixel-thin blob: its box centre, and its outline as the
			// box so that the caller can still measure it.
			cen = Point{float64(box.Min.X+box.Max.X) / 2, float64(box.Min.Y+box.Max.Y) / 2}
			poly = []Point{{float64(box.Min.X), float64(box.Min.Y)}, {float64(box.Max.X), float64(box.Min.Y)}, {float64(box.Max.X), float64(box.Max.Y)}, {float64(box.Min.X), float64(box.Max.Y)}}
		}
		out = append(out, Blob{
			Centroid: cen,
			Area:     float64(px) * d.scale * d.scale,
			Pixels:   px,
			Box:      box,
			Contour:  poly,
		})
	}
	return out, highlights
}

// polygonCentroid returns the area centroid of a simple polygon (the
// standard shoelace moment formulas).
func polygonCentroid(poly []Point) (Point, bool) {
	var a, cx, cy float64
	for i := range poly {
		j := (i + 1) % len(poly)
		cr := poly[i].X*poly[j].Y - poly[j].X*poly[i].Y
		a += cr
		cx += (poly[i].X + poly[j].X) * cr
		cy += (poly[i].Y + poly[j].Y) * cr
	}
	if math.Abs(a) < 1e-9 {
		return Point{}, false
	}
	return Point{cx / (3 * a), cy / (3 * a)}, true
}

// Close frees every Mat the detector owns. It is safe to call twice.
func (d *Detector) Close() error {
	if d.closed {
		return nil
	}
	d.closed = true
	for _, m := range []*gocv.Mat{&d.mask, &d.small, &d.gray, &d.fg, &d.bin, &d.learnImg, &d.bgImg, &d.hold, &d.glint, &d.dark, &d.kOpen, &d.kGlint, &d.kClose, &d.kFill, &d.fine, &d.opened, &d.prevGray} {
		m.Close()
	}
	return d.bg.Close()
}
