package vision

import (
	"errors"
	"fmt"
	"image"
	"image/color"
	"math"

	"gocv.io/x/gocv"
)

// DriftConfig sets up registration of live frames to a reference frame.
type DriftConfig struct {
	// Water is the pool's outline in reference-frame pixels. Features are
	// taken only outside it (deck, coping, walls), because the water's
	// surface never looks the same twice. Empty uses the whole frame.
	Water []Point
	// Margin dilates the water outline by this many pixels before it is
	// masked out, so waves lapping the coping are excluded; zero selects
	// 1 % of the frame diagonal.
	Margin int
	// Features is the number of ORB keypoints per frame; zero selects 1500.
	Features int
	// MaxWidth scales frames wider than this down before detection (the
	// result is scaled back); zero selects 1280.
	MaxWidth int
}

// Drift holds a reference frame's features for registering live frames
// to it. Not safe for concurrent use; Close frees it.
type Drift struct {
	cfg     DriftConfig
	size    image.Point // reference frame size, px
	scale   float64     // reference px per working px
	orb     gocv.ORB
	matcher gocv.BFMatcher
	refKP   []gocv.KeyPoint
	refDesc gocv.Mat
	mask    gocv.Mat // working-size 8-bit mask, 255 where features may be taken
	gray    gocv.Mat
	small   gocv.Mat
	closed  bool
}

// DriftResult is the outcome of registering a live frame to the
// reference.
type DriftResult struct {
	// H maps reference-frame pixels to live-frame pixels (row-major 3×3).
	// It is the identity when the camera has not moved.
	H [9]float64
	// Matches passed the ratio test; Inliers agree with H.
	Matches, Inliers int
}

// Map applies r.H to a reference-frame pixel.
func (r DriftResult) Map(p Point) (Point, bool) {
	h := r.H
	w := h[6]*p.X + h[7]*p.Y + h[8]
	if math.Abs(w) < 1e-12 {
		return Point{}, false
	}
	return Point{(h[0]*p.X + h[1]*p.Y + h[2]) / w, (h[3]*p.X + h[4]*p.Y + h[5]) / w}, true
}

// ErrNoRegistration means too few features matched between the live and
// reference frames to say where the camera points (covered lens, night,
// the camera turned right away from the pool).
var ErrNoRegistration = errors.New("live frame does not register to the reference")

// Registration thresholds: Lowe's ratio test at 0.75 (Lowe, IJCV 2004,
// suggests 0.8 for SIFT; binary descriptors are noisier, so stricter),
// a RANSAC reprojection threshold of 2 px, and at least 12 inliers.
const (
	driftRatio      = 0.75
	driftRansacPx   = 2.0
	driftMinInliers = 12
	// driftMethod is OpenCV's USAC_MAGSAC (calib3d.hpp, value 38, in
	// OpenCV 4.5 and later): MAGSAC++ scoring with local optimisation,
	// markedly more accurate than plain RANSAC for the same matches.
	driftMethod = gocv.HomographyMethod(38)
	// driftFineOctave is the coarsest pyramid level used in the refit.
	driftFineOctave = 1
	// driftFAST is the FAST corner threshold in grey levels, below
	// OpenCV's default of 20, because decks and coping are low-contrast.
	driftFAST = 8
	// driftContrast is the grey-level standard deviation a dim frame
	// (dusk, cloud, night) is stretched to, so that its corners pass the
	// same FAST threshold as in daylight. Frames with more contrast are
	// left alone: any remapping moves corner responses and costs accuracy.
	driftContrast = 40.0
)

// NewDrift extracts the reference frame's features. ref is the frame the
// calibration was made on.
func NewDrift(ref image.Image, cfg DriftConfig) (*Drift, error) {
	m, err := imageMat(ref)
	defer m.Close()
	if err != nil {
		return nil, fmt.Errorf("drift reference: %w", err)
	}
	return newDriftMat(m, cfg)
}

func newDriftMat(ref gocv.Mat, cfg DriftConfig) (*Drift, error) {
	if ref.Empty() {
		return nil, errors.New("drift reference: empty frame")
	}
	if cfg.Features == 0 {
		cfg.Features = 1500
	}
	if cfg.MaxWidth == 0 {
		cfg.MaxWidth = 1280
	}
	d := &Drift{
		cfg:     cfg,
		size:    image.Pt(ref.Cols(), ref.Rows()),
		scale:   1,
		orb:     gocv.NewORBWithParams(cfg.Features, 1.2, 8, 31, 0, 2, gocv.ORBScoreTypeHarris, 31, driftFAST),
		matcher: gocv.NewBFMatcherWithParams(gocv.NormHamming, false),
		refDesc: gocv.NewMat(),
		mask:    gocv.NewMat(),
		gray:    gocv.NewMat(),
		small:   gocv.NewMat(),
	}
	if d.size.X > cfg.MaxWidth {
		d.scale = float64(d.size.X) / float64(cfg.MaxWidth)
	}
	work := image.Pt(int(math.Round(float64(d.size.X)/d.scale)), int(math.Round(float64(d.size.Y)/d.scale)))
	d.buildMask(work)
	kp, desc := d.detect(ref)
	d.refKP = kp
	d.refDesc.Close()
	d.refDesc = desc
	if len(kp) < driftMinInliers {
		d.Close()
		return nil, fmt.Errorf("drift reference: only %d features outside the water; the deck and coping need texture in view (or widen the view)", len(kp))
	}
	return d, nil
}

// buildMask paints 255 everywhere but the dilated water outline.
func (d *Drift) buildMask(work image.Point) {
	d.mask.Close()
	d.mask = gocv.NewMatWithSizeFromScalar(gocv.NewScalar(255, 0, 0, 0), work.Y, work.X, gocv.MatTypeCV8U)
	if len(d.cfg.Water) < 3 {
		return
	}
	pts := make([]image.Point, len(d.cfg.Water))
	for i, p := range d.cfg.Water {
		pts[i] = image.Pt(int(math.Round(p.X/d.scale)), int(math.Round(p.Y/d.scale)))
	}
	pv := gocv.NewPointsVectorFromPoints([][]image.Point{pts})
	defer pv.Close()
	gocv.FillPoly(&d.mask, pv, color.RGBA{})
	margin := d.cfg.Margin
	if margin == 0 {
		margin = int(math.Ceil(0.01 * math.Hypot(float64(d.size.X), float64(d.size.Y))))
	}
	if k := int(math.Round(float64(margin) / d.scale)); k > 0 {
		// Eroding the kept region grows the masked-out water.
		kern := gocv.GetStructuringElement(gocv.MorphEllipse, image.Pt(2*k+1, 2*k+1))
		defer kern.Close()
		gocv.Erode(d.mask, &d.mask, kern)
	}
}

// detect returns keypoints (full-resolution pixels) and descriptors of a
// BGR frame. The caller closes the descriptors.
func (d *Drift) detect(frame gocv.Mat) ([]gocv.KeyPoint, gocv.Mat) {
	gocv.CvtColor(frame, &d.gray, gocv.ColorBGRToGray)
	d.stretch()
	src := d.gray
	if d.scale != 1 {
		gocv.Resize(d.gray, &d.small, image.Pt(d.mask.Cols(), d.mask.Rows()), 0, 0, gocv.InterpolationArea)
		src = d.small
	}
	kp, desc := d.orb.DetectAndCompute(src, d.mask)
	for i := range kp {
		kp[i].X *= d.scale
		kp[i].Y *= d.scale
	}
	return kp, desc
}

// stretch raises the contrast of a dim grey frame in place.
func (d *Drift) stretch() {
	mean, std := gocv.NewMat(), gocv.NewMat()
	defer mean.Close()
	defer std.Close()
	gocv.MeanStdDev(d.gray, &mean, &std)
	m, s := mean.GetDoubleAt(0, 0), std.GetDoubleAt(0, 0)
	if s <= 0 || s >= driftContrast {
		return
	}
	g := driftContrast / s
	d.gray.ConvertToWithParams(&d.gray, gocv.MatTypeCV8U, float32(g), float32(128-g*m))
}

// Register estimates the homography from the reference frame to live
// (an image of the same size), with ORB features matched by Hamming
// distance, Lowe's ratio test and OpenCV's RANSAC.
func (d *Drift) Register(live image.Image) (DriftResult, error) {
	m, err := imageMat(live)
	defer m.Close()
	if err != nil {
		return DriftResult{}, fmt.Errorf("register frame: %w", err)
	}
	return d.registerMat(m)
}

func (d *Drift) registerMat(live gocv.Mat) (DriftResult, error) {
	if d.closed {
		return DriftResult{}, errors.New("register frame: drift checker closed")
	}
	if sz := image.Pt(live.Cols(), live.Rows()); sz != d.size {
		return DriftResult{}, fmt.Errorf("register frame: live frame is %v px, reference %v px; recalibrate after changing the stream", sz, d.size)
	}
	kp, desc := d.detect(live)
	defer desc.Close()
	if len(kp) < driftMinInliers || desc.Empty() {
		return DriftResult{}, fmt.Errorf("register frame: %w: %d features in the live frame", ErrNoRegistration, len(kp))
	}
	var src, dst []gocv.Point2f
	var octave []int
	for _, mm := range d.matcher.KnnMatch(d.refDesc, desc, 2) {
		if len(mm) < 2 || mm[0].Distance >= driftRatio*mm[1].Distance {
			continue
		}
		a, b := d.refKP[mm[0].QueryIdx], kp[mm[0].TrainIdx]
		src = append(src, gocv.Point2f{X: float32(a.X), Y: float32(a.Y)})
		dst = append(dst, gocv.Point2f{X: float32(b.X), Y: float32(b.Y)})
		octave = append(octave, max(a.Octave, b.Octave))
	}
	res := DriftResult{Matches: len(src)}
	if len(src) < driftMinInliers {
		return res, fmt.Errorf("register frame: %w: %d matches pass the ratio test", ErrNoRegistration, len(src))
	}
	sm := pointsMat(src)
	defer sm.Close()
	dm := pointsMat(dst)
	defer dm.Close()
	inl := gocv.NewMat()
	defer inl.Close()
	h := gocv.FindHomography(sm, &dm, driftMethod, driftRansacPx, &inl, 2000, 0.995)
	defer h.Close()
	if h.Empty() {
		return res, fmt.Errorf("register frame: %w: no homography from %d matches", ErrNoRegistration, len(src))
	}
	for i := 0; i < inl.Rows(); i++ {
		if inl.GetUCharAt(i, 0) != 0 {
			res.Inliers++
		}
	}
	if res.Inliers < driftMinInliers {
		return res, fmt.Errorf("register frame: %w: %d of %d matches agree", ErrNoRegistration, res.Inliers, len(src))
	}
	for i := 0; i < 9; i++ {
		res.H[i] = h.GetDoubleAt(i/3, i%3)
	}
	// Keypoints found on coarse pyramid levels are located to a pixel
	// of that level only (1.2^octave full-resolution pixels), so refit
	// by least squares on the fine-level inliers when there are enough.
	var fs, fd []gocv.Point2f
	for i := 0; i < inl.Rows(); i++ {
		if inl.GetUCharAt(i, 0) != 0 && octave[i] <= driftFineOctave {
			fs, fd = append(fs, src[i]), append(fd, dst[i])
		}
	}
	if len(fs) >= 2*driftMinInliers {
		fsm, fdm := pointsMat(fs), pointsMat(fd)
		empty := gocv.NewMat()
		ref := gocv.FindHomography(fsm, &fdm, gocv.HomograpyMethodAllPoints, 0, &empty, 0, 0)
		if !ref.Empty() {
			for i := 0; i < 9; i++ {
				res.H[i] = ref.GetDoubleAt(i/3, i%3)
			}
		}
		ref.Close()
		empty.Close()
		fsm.Close()
		fdm.Close()
	}
	if s := res.H[8]; s != 0 {
		for i := range res.H {
			res.H[i] /= s
		}
	}
	return res, nil
}

func pointsMat(pts []gocv.Point2f) gocv.Mat {
	m := gocv.NewMatWithSize(len(pts), 1, gocv.MatTypeCV64FC2)
	for i, p := range pts {
		m.SetDoubleAt(i, 0, float64(p.X))
		m.SetDoubleAt(i, 1, float64(p.Y))
	}
	return m
}

// CheckDrift registers the camera's latest full-resolution frame to the
// drift reference.
func (c *Camera) CheckDrift(d *Drift) (DriftResult, error) {
	if c.closed {
		return DriftResult{}, errors.New("check drift: no frame read yet")
	}
	frame, err := c.bgr()
	if err != nil {
		return DriftResult{}, fmt.Errorf("check drift: %w", err)
	}
	if frame.Empty() {
		return DriftResult{}, errors.New("check drift: no frame read yet")
	}
	return d.registerMat(frame)
}

// Close frees the reference features and Mats. Safe to call twice.
func (d *Drift) Close() error {
	if d.closed {
		return nil
	}
	d.closed = true
	d.orb.Close()
	d.matcher.Close()
	d.refDesc.Close()
	d.mask.Close()
	d.gray.Close()
	d.small.Close()
	return nil
}
