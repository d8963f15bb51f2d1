package vision

// #include <stdlib.h>
// #include "shim.h"
import "C"

import (
	"errors"
	"fmt"
	"image"
	"math"
	"slices"
	"time"
	"unsafe"

	"gocv.io/x/gocv"

	"stillwater/vision/decode"
)

// Rectification is the top-down raster of the pool plane the mean–variance
// detector works on, as plain values from the caller's calibration: a grid
// of square cells Cell plane units wide (stillwater: metres), Cols across
// and Rows down, cell (0, 0)'s top-left corner at (OriginX, OriginY) on the
// plane. MapX and MapY give, row by row, the source pixel (as recorded,
// lens distortion included) that sees each cell's centre, -1 where no
// pixel does; Water marks the cells to watch: CellWater on the water's
// surface, CellDeck around it (where a body climbing in is seen whole),
// 0 not watched; Src is the source frame size the maps were made for (zero:
// whatever size the source delivers; cells mapped outside it are not
// watched).
type Rectification struct {
	Cols, Rows       int
	Cell             float64
	OriginX, OriginY float64
	MapX, MapY       []float32
	Water            []byte
	Src              image.Point
	// Nadir is the point of the plane under the camera, plane units; nil
	// when the camera's position is not known. It tells which end of a
	// candidate is nearest the camera (Features.Foot).
	Nadir *Point
}

// Kinds of cell in Rectification.Water.
const (
	CellWater = 1
	CellDeck  = 2
)

// validate checks the sizes agree.
func (r *Rectification) validate() error {
	n := r.Cols * r.Rows
	switch {
	case r.Cols <= 0 || r.Rows <= 0:
		return fmt.Errorf("rectification: %d×%d cells", r.Cols, r.Rows)
	case len(r.MapX) != n || len(r.MapY) != n || len(r.Water) != n:
		return fmt.Errorf("rectification: maps of %d, %d and water of %d cells for a %d×%d grid", len(r.MapX), len(r.MapY), len(r.Water), r.Cols, r.Rows)
	case !(r.Cell > 0):
		return fmt.Errorf("rectification: cell size %v", r.Cell)
	case r.Src.X < 0 || r.Src.Y < 0:
		return fmt.Errorf("rectification: source frame size %v", r.Src)
	}
	return nil
}

// plane returns the plane position of a point in cell units (the centre of
// cell (i, j) is (i+0.5, j+0.5)).
func (r *Rectification) plane(x, y float64) (float64, float64) {
	return r.OriginX + x*r.Cell, r.OriginY + y*r.Cell
}

// source returns the source pixel of a point in cell units, interpolating
// the maps between cell centres; false where the cell is not seen.
func (r *Rectification) source(x, y float64) (Point, bool) {
	i := min(max(int(math.Floor(x)), 0), r.Cols-1)
	j := min(max(int(math.Floor(y)), 0), r.Rows-1)
	k := j*r.Cols + i
	if r.MapX[k] < 0 {
		return Point{}, false
	}
	// The map is smooth; the neighbour's step gives the local gradient.
	dx, dy := x-float64(i)-0.5, y-float64(j)-0.5
	px, py := float64(r.MapX[k]), float64(r.MapY[k])
	if i+1 < r.Cols && r.MapX[k+1] >= 0 {
		px += dx * float64(r.MapX[k+1]-r.MapX[k])
		py += dx * float64(r.MapY[k+1]-r.MapY[k])
	}
	if j+1 < r.Rows && r.MapX[k+r.Cols] >= 0 {
		px += dy * float64(r.MapX[k+r.Cols]-r.MapX[k])
		py += dy * float64(r.MapY[k+r.Cols]-r.MapY[k])
	}
	return Point{px, py}, true
}

// scaled returns the rectification for frames of another size (a camera
// that came back with a different stream): the maps scale with the frame.
func (r *Rectification) scaled(to image.Point) *Rectification {
	if to == r.Src {
		return r
	}
	sx, sy := float32(to.X)/float32(r.Src.X), float32(to.Y)/float32(r.Src.Y)
	out := *r
	out.MapX, out.MapY = make([]float32, len(r.MapX)), make([]float32, len(r.MapY))
	for i := range r.MapX {
		if r.MapX[i] < 0 {
			out.MapX[i], out.MapY[i] = -1, -1
			continue
		}
		out.MapX[i], out.MapY[i] = r.MapX[i]*sx, r.MapY[i]*sy
	}
	out.Src = to
	return &out
}

// MeanVarConfig tunes the mean–variance detector. Zero fields take the
// defaults in DefaultMeanVar.
type MeanVarConfig struct {
	// FPS is the frame rate the time constants are turned into rates with.
	FPS float64
	// Short is the time constant of the short temporal mean that is
	// compared with the background: caustics, glitter and ripples change
	// many times within it and average out, a person does not.
	Short time.Duration
	// Learn is the time constant with which the background's mean and
	// variance follow the water where nothing is found.
	Learn time.Duration
	// Absorb is the time constant with which a change nobody tracks (a
	// toy left floating) is learned into the background. Tracked cells
	// (the hold boxes) are never learned.
	Absorb time.Duration
	// WarmUp is how long a model started without a reference learns every
	// cell before it reports anything.
	WarmUp time.Duration
	// Settle is how long a model started from a reference only fills its
	// short mean before it reports.
	Settle time.Duration
	// Threshold is the score (the squared difference from the background
	// under the local light, divided by the cell's own variance plus the
	// noise floor, summed over the three colour channels) a candidate's
	// core must reach.
	Threshold float64
	// Low is the score that joins a cell to a candidate whose core passed
	// Threshold: the faint parts of a body below the surface.
	Low float64
	// Noise is the floor added to each cell's standard deviation, grey
	// levels: sensor noise and compression of still floor.
	Noise float64
	// LightCell is the side, plane units, of the squares over which the
	// local illumination ratio is measured: large against a child, small
	// against a cloud shadow.
	LightCell float64
	// Join is the gap, plane units, closed between parts of one body.
	Join float64
	// Shift is how far, plane units, the picture of the floor may seem to
	// move (camera shake, refraction by ripples): at structure (lane lines,
	// walls, the pool's edge) the variance allows for it.
	Shift float64
	// Smooth is the standard deviation, plane units, of the spatial blur
	// of each rectified frame: caustic and glitter patterns are finer than
	// a body and average out over it.
	Smooth float64
}

// DefaultMeanVar returns the tuned defaults (see the commit that fits them
// for the tuning data).
func DefaultMeanVar() MeanVarConfig {
	return MeanVarConfig{
		FPS:       10,
		Short:     time.Second,
		Learn:     30 * time.Second,
		Absorb:    5 * time.Minute,
		WarmUp:    4 * time.Second,
		Settle:    1500 * time.Millisecond,
		Threshold: 60,
		Low:       20,
		Noise:     2,
		LightCell: 1.0,
		Join:      0.1,
		Smooth:    0.03,
		Shift:     0.03,
	}
}

func (c MeanVarConfig) withDefaults() MeanVarConfig {
	d := DefaultMeanVar()
	if c.FPS <= 0 || c.FPS > 240 {
		c.FPS = d.FPS
	}
	if c.Short <= 0 {
		c.Short = d.Short
	}
	if c.Learn <= 0 {
		c.Learn = d.Learn
	}
	if c.Absorb <= 0 {
		c.Absorb = d.Absorb
	}
	if c.WarmUp <= 0 {
		c.WarmUp = d.WarmUp
	}
	if c.Settle <= 0 {
		c.Settle = d.Settle
	}
	if c.Threshold <= 0 {
		c.Threshold = d.Threshold
	}
	if c.Low <= 0 || c.Low > c.Threshold {
		c.Low = math.Min(d.Low, c.Threshold)
	}
	if c.Noise <= 0 {
		c.Noise = d.Noise
	}
	if c.LightCell <= 0 {
		c.LightCell = d.LightCell
	}
	if c.Join < 0 {
		c.Join = 0
	}
	if c.Smooth < 0 {
		c.Smooth = 0
	}
	if c.Shift < 0 {
		c.Shift = 0
	}
	return c
}

// frames turns a duration into a frame count at the configured rate.
func (c MeanVarConfig) frames(d time.Duration) int {
	return max(1, int(math.Round(d.Seconds()*c.FPS)))
}

// rate is the per-frame learning rate of an exponential mean with time
// constant d.
func (c MeanVarConfig) rate(d time.Duration) float64 {
	return 1 / math.Max(1, d.Seconds()*c.FPS)
}

// Reference is a saved background of the rectified pool: per cell and
// colour channel (B, G, R), the mean of the short temporal mean and its
// variance, grey levels. It lets a detector start watching at once,
// knowing what the empty pool looks like.
type Reference struct {
	Cols, Rows int
	Mean, Var  []float32 // 3 values a cell, row by row
	// Frames is how many frames the model had learned from.
	Frames int
}

// Features describe one candidate: what it is judged on and what an
// explanation of a decision shows. Areas and lengths are plane units
// (stillwater: m², m).
type Features struct {
	// Area is the whole candidate: every cell scoring at least Low,
	// joined. A body's parts below the surface count.
	Area float64
	// Core is the part scoring at least Threshold.
	Core float64
	// Score is the mean score over Area; Peak the highest.
	Score, Peak float64
	// Contrast is the mean brightness against the water expected there,
	// relative: −0.3 is 30 % darker, +0.3 brighter.
	Contrast float64
	// Chroma is the mean distance of the candidate's core colour from the
	// water's in chromaticity (each channel's share of the sum), ×100: a
	// shadow only darkens the water and keeps its chromaticity, a person
	// has colours of their own.
	Chroma float64
	// ChromaTop is Chroma over the most coloured quarter of the core: a
	// head or a limb in a suit the colour of the water.
	ChromaTop float64
	// Half is the area scoring at least a quarter of Peak (half the
	// contrast): about the object's own outline.
	Half float64
	// Bright is the share of Area brighter than the water expected there.
	Bright float64
	// Tint is the chromaticity distance from grey of the core's difference
	// from the water (×100): 0 for white light added to the water (a glint,
	// a reflection of the sky), tens for skin or a coloured suit.
	Tint float64
	// Faint is set on a candidate with no core that was kept because
	// most of it lies in a hold box: a tracked body dimmed below the
	// threshold. Only a track already in alarm should take it.
	Faint bool
	// Wet is the share of Area on the water (the rest is on the deck
	// around it: a body climbing in or out).
	Wet float64
	// Water is the distance of the water's own chromaticity there from
	// grey, ×100: near 0 in a monochrome (night infrared) picture, where
	// chromaticity tells nothing.
	Water float64
	// Length and Width are the candidate's extent along its major and
	// minor axes (from its second moments, as for an ellipse).
	Length, Width float64
	// Edge is the distance from the candidate's centre to the nearest
	// cell that is not water.
	Edge float64
	// ShiftX and ShiftY lead from the candidate's position (PlaneBlob X,
	// Y, which the rules judge) to where it is reported, plane units: the
	// centre of its part at a quarter of the score a tenth of its cells
	// reach, instead of a quarter of its single highest cell. That part
	// covers more of a body, so its centre sits on the body more steadily;
	// as the position the rules judge it moved which candidates passed
	// them, so it only moves what is reported. Zero where the position
	// is not the strongest part's (a trail across the edge).
	ShiftX, ShiftY float64
	// Foot is how far out on the deck the candidate's end nearest the
	// camera lies (its part at half contrast), from the nearest water: 0
	// when that end is on the water or the camera's position is not known
	// (Rectification.Nadir). Something upright is seen from above as if
	// laid down on the plane away from the camera, from where it stands:
	// a person standing on the deck between the camera and the water is
	// seen over the water, with only the feet on the deck.
	Foot float64
	// Present is how much of the candidate is there in the current frame:
	// its difference from the expected water in this frame over its
	// difference in the short mean, on its part at half contrast. About 1
	// for something that stays, near 0 for the trail of something that has
	// left (the short mean still holds it), above 1 where something has
	// just arrived.
	Present float64
}

// PlaneBlob is where a candidate of the rectified detector is on the
// plane, in the caller's plane units, and which cells it covers.
type PlaneBlob struct {
	X, Y  float64         // centre
	Cells image.Rectangle // bounding box in grid cells; give it back as a hold box
	// Near is the centre of the candidate's end nearest the point under
	// the camera (the cells Features.Foot is measured over), nil when the
	// camera's position is not known: where a body upright in the water
	// meets it, its upright part seen beyond, away from the camera.
	Near *Point
}

// meanVar is the mean–variance detector on the rectified pool. Not safe
// for concurrent use; Close frees it.
type meanVar struct {
	cfg  MeanVarConfig
	rect *Rectification
	src  image.Point
	size image.Point // grid cells

	mapX, mapY gocv.Mat // CV_32FC1 maps
	// fmapX, fmapY are mapX, mapY in OpenCV's fixed-point form and cmapX,
	// cmapY those onto a frame's chroma planes, made for chroma shifts
	// cmapFor; py, pcb, pcr the planes remapped (see rectifyPlanes).
	fmapX, fmapY gocv.Mat
	cmapX, cmapY gocv.Mat
	cmapFor      [2]int
	cmapReady    bool
	py, pcb, pcr gocv.Mat
	water        gocv.Mat // CV_8UC1, 255 on watched cells (water and deck)
	waterArea    int
	wet          []byte    // 1 on the water's cells
	edge         []float32 // distance to the nearest unwatched cell, cells
	deckDepth    []float32 // distance of a deck cell from the nearest water cell, cells; 0 on the water
	frame        gocv.Mat  // CV_8UC3 remapped frame
	blurred      gocv.Mat  // CV_8UC3 smooth's output, swapped with frame (a blur in place would copy the frame each time)
	short        gocv.Mat  // CV_32FC3 short temporal mean
	mean, vari   gocv.Mat  // CV_32FC3 background
	gain         gocv.Mat  // CV_32FC3 local illumination ratio
	glint        gocv.Mat  // CV_32FC1 how often each cell starts or stops glinting
	glintPrev    gocv.Mat  // CV_8UC1 whether each cell glinted in the last frame
	extra        gocv.Mat  // CV_32FC3 variance a slight shift of the picture adds at structure
	gx, gy       gocv.Mat  // CV_32FC3 scratch: the mean's gradient
	score        gocv.Mat  // CV_32FC1
	contrast     gocv.Mat  // CV_32FC1
	weight       gocv.Mat  // CV_8UC1 cells the illumination is measured on
	hold         gocv.Mat  // CV_8UC1 cells not learned
	lo, hi       gocv.Mat  // CV_8UC1 thresholded scores
	thresh       gocv.Mat  // CV_32FC1 a score thresholded, before it becomes lo or hi (converting in place would allocate both each frame)
	fg           gocv.Mat  // CV_8UC1 last frame's candidates, dilated
	labels       gocv.Mat
	stats        gocv.Mat
	cents        gocv.Mat
	kJoin        gocv.Mat
	kGrow        gocv.Mat
	kFill        gocv.Mat // probe: keeps only flat areas of decoder grey
	gray, prev   gocv.Mat // probe: grey rectified frames
	probeF       gocv.Mat // probe: the frame as float
	scratch      gocv.Mat

	ref      *Reference
	frames   int // frames the model has learned from
	shortN   int // frames in the short mean
	relearn  int
	reported bool // the model has reported (warm-up over)
	// settling: after a reconnect to the same picture the short mean
	// starts again and fills for Settle before anything is compared.
	settling bool
	closed   bool
	chromas  []float64 // scratch: per-cell chroma of one candidate
	scores   []float32 // scratch: the scores of one candidate's cells
	clock    *StageClock
}

// errNoRectification is returned for a mean–variance detector set up
// without a grid.
var errNoRectification = errors.New("the mean-variance detector needs a rectification grid")

func newMeanVar(cfg DetectorConfig, src image.Point) (*meanVar, error) {
	if cfg.Grid == nil {
		return nil, errNoRectification
	}
	r := cfg.Grid
	if err := r.validate(); err != nil {
		return nil, err
	}
	if r.Src != (image.Point{}) && src != r.Src {
		r = r.scaled(src)
	}
	mc := cfg.MeanVar.withDefaults()
	d := &meanVar{cfg: mc, rect: r, src: src, size: image.Pt(r.Cols, r.Rows), ref: cfg.Reference}
	if d.ref != nil && (d.ref.Cols != r.Cols || d.ref.Rows != r.Rows || len(d.ref.Mean) != 3*r.Cols*r.Rows || len(d.ref.Var) != 3*r.Cols*r.Rows) {
		return nil, fmt.Errorf("reference of %d×%d cells for a grid of %d×%d", d.ref.Cols, d.ref.Rows, r.Cols, r.Rows)
	}
	w, h := r.Cols, r.Rows
	d.mapX = gocv.NewMatWithSize(h, w, gocv.MatTypeCV32F)
	d.mapY = gocv.NewMatWithSize(h, w, gocv.MatTypeCV32F)
	d.water = gocv.NewMatWithSize(h, w, gocv.MatTypeCV8U)
	for _, m := range []*gocv.Mat{&d.frame, &d.blurred, &d.thresh, &d.score, &d.contrast, &d.lo, &d.hi, &d.labels, &d.stats, &d.cents, &d.gray, &d.prev, &d.probeF, &d.scratch, &d.fmapX, &d.fmapY, &d.cmapX, &d.cmapY, &d.py, &d.pcb, &d.pcr} {
		*m = gocv.NewMat()
	}
	d.short = gocv.NewMatWithSize(h, w, gocv.MatTypeCV32FC3)
	d.mean = gocv.NewMatWithSize(h, w, gocv.MatTypeCV32FC3)
	d.vari = gocv.NewMatWithSize(h, w, gocv.MatTypeCV32FC3)
	d.gain = gocv.NewMatWithSize(h, w, gocv.MatTypeCV32FC3)
	d.glint = gocv.NewMatWithSize(h, w, gocv.MatTypeCV32F)
	d.glintPrev = gocv.NewMatWithSize(h, w, gocv.MatTypeCV8U)
	d.extra = gocv.NewMatWithSize(h, w, gocv.MatTypeCV32FC3)
	d.gx, d.gy = gocv.NewMat(), gocv.NewMat()
	d.weight = gocv.NewMatWithSize(h, w, gocv.MatTypeCV8U)
	d.hold = gocv.NewMatWithSize(h, w, gocv.MatTypeCV8U)
	d.fg = gocv.NewMatWithSize(h, w, gocv.MatTypeCV8U)
	join := max(1, 2*int(math.Round(mc.Join/r.Cell/2))+1)
	d.kJoin = gocv.GetStructuringElement(gocv.MorphEllipse, image.Pt(join, join))
	grow := max(3, 2*int(math.Round(0.15/r.Cell))+1)
	d.kGrow = gocv.GetStructuringElement(gocv.MorphEllipse, image.Pt(grow, grow))
	d.kFill = gocv.GetStructuringElement(gocv.MorphRect, image.Pt(fillBlock, fillBlock))

	mx, _ := d.mapX.DataPtrFloat32()
	my, _ := d.mapY.DataPtrFloat32()
	copy(mx, r.MapX)
	copy(my, r.MapY)
	wb, _ := d.water.DataPtrUint8()
	d.wet = make([]byte, len(r.Water))
	for i, v := range r.Water {
		if v != 0 && r.MapX[i] >= 0 && r.MapX[i] <= float32(src.X-1) && r.MapY[i] <= float32(src.Y-1) {
			wb[i] = 255
			d.waterArea++
			if v == CellWater {
				d.wet[i] = 1
			}
		} else {
			wb[i] = 0
		}
	}
	d.edge = edgeDistance(d.wet, w, h, 0)
	if r.Nadir != nil {
		deck := make([]byte, len(d.wet))
		for i, v := range d.wet {
			deck[i] = 1 - v
		}
		d.deckDepth = edgeDistance(deck, w, h, float32(w+h))
	}
	if err := d.restart(); err != nil {
		d.Close()
		return nil, err
	}
	return d, nil
}

// edgeDistance returns, per cell set in in, the distance in cells to the
// nearest cell not set (a two-pass chamfer transform), beyond the grid
// being outside cells away.
func edgeDistance(in []byte, w, h int, outside float32) []float32 {
	const inf = float32(1e9)
	d := make([]float32, w*h)
	for i, v := range in {
		if v != 0 {
			d[i] = inf
		}
	}
	at := func(x, y int) float32 {
		if x < 0 || y < 0 || x >= w || y >= h {
			return outside
		}
		return d[y*w+x]
	}
	for y := 0; y < h; y++ {
		for x := 0; x < w; x++ {
			k := y*w + x
			if d[k] == 0 {
				continue
			}
			d[k] = min(d[k], at(x-1, y)+1, at(x, y-1)+1, at(x-1, y-1)+1.4142, at(x+1, y-1)+1.4142)
		}
	}
	for y := h - 1; y >= 0; y-- {
		for x := w - 1; x >= 0; x-- {
			k := y*w + x
			if d[k] == 0 {
				continue
			}
			d[k] = min(d[k], at(x+1, y)+1, at(x, y+1)+1, at(x+1, y+1)+1.4142, at(x-1, y+1)+1.4142)
		}
	}
	return d
}

// restart drops what the model learned: it starts from the reference
// when there is one, else it warms up again.
func (d *meanVar) restart() error {
	d.frames, d.shortN, d.relearn, d.reported, d.settling = 0, 0, 0, false, false
	d.gain.SetTo(gocv.NewScalar(1, 1, 1, 0))
	d.fg.SetTo(gocv.NewScalar(0, 0, 0, 0))
	d.glint.SetTo(gocv.NewScalar(0, 0, 0, 0))
	d.glintPrev.SetTo(gocv.NewScalar(0, 0, 0, 0))
	d.extra.SetTo(gocv.NewScalar(0, 0, 0, 0))
	if d.ref == nil {
		d.mean.SetTo(gocv.NewScalar(0, 0, 0, 0))
		d.vari.SetTo(gocv.NewScalar(0, 0, 0, 0))
		return nil
	}
	m, err := d.mean.DataPtrFloat32()
	if err != nil {
		return err
	}
	v, err := d.vari.DataPtrFloat32()
	if err != nil {
		return err
	}
	copy(m, d.ref.Mean)
	copy(v, d.ref.Var)
	d.frames = d.cfg.frames(d.cfg.WarmUp)
	return nil
}

// Reference returns the current background, for saving as the empty-pool
// reference; false while the model has not learned enough.
func (d *meanVar) Reference() (Reference, bool) {
	if d.frames < d.cfg.frames(d.cfg.WarmUp) {
		return Reference{}, false
	}
	m, err1 := d.mean.DataPtrFloat32()
	v, err2 := d.vari.DataPtrFloat32()
	if err1 != nil || err2 != nil {
		return Reference{}, false
	}
	return Reference{Cols: d.size.X, Rows: d.size.Y, Mean: append([]float32(nil), m...), Var: append([]float32(nil), v...), Frames: d.frames}, true
}

func (d *meanVar) Size() image.Point    { return d.size }
func (d *meanVar) srcSize() image.Point { return d.src }

// rectify remaps the source frame onto the grid.
func (d *meanVar) rectify(frame gocv.Mat) error {
	if frame.Empty() {
		return ErrEmptyFrame
	}
	if frame.Cols() != d.src.X || frame.Rows() != d.src.Y {
		return fmt.Errorf("detect: frame is %dx%d, detector was set up for %dx%d", frame.Cols(), frame.Rows(), d.src.X, d.src.Y)
	}
	if frame.Channels() != 3 {
		gocv.CvtColor(frame, &d.scratch, gocv.ColorGrayToBGR)
		gocv.Remap(d.scratch, &d.frame, &d.mapX, &d.mapY, gocv.InterpolationLinear, gocv.BorderReplicate, black)
		return nil
	}
	gocv.Remap(frame, &d.frame, &d.mapX, &d.mapY, gocv.InterpolationLinear, gocv.BorderReplicate, black)
	return nil
}

// rectifyPlanes remaps a frame given as its decoder's planes onto the
// grid: each plane is remapped (the chroma planes by maps scaled to their
// size, centred as swscale's unscaled conversion treats them: each
// chroma sample covers its block of luma pixels) and only the grid's
// cells are converted to BGR. What rectify gives for the same frame
// converted in full, but for rounding and the chroma's interpolation.
func (d *meanVar) rectifyPlanes(p decode.Planes) error {
	if p.Size != d.src {
		return fmt.Errorf("detect: frame is %dx%d, detector was set up for %dx%d", p.Size.X, p.Size.Y, d.src.X, d.src.Y)
	}
	if !d.cmapReady || d.cmapFor != [2]int{p.ShiftX, p.ShiftY} {
		// A chroma sample k covers luma pixels k·2^s to (k+1)·2^s − 1:
		// luma x is chroma (x + 0.5) / 2^s − 0.5.
		fx, fy := 1/float64(int(1)<<p.ShiftX), 1/float64(int(1)<<p.ShiftY)
		cx, cy := gocv.NewMat(), gocv.NewMat()
		defer cx.Close()
		defer cy.Close()
		d.mapX.ConvertToWithParams(&cx, gocv.MatTypeCV32F, float32(fx), float32(0.5*fx-0.5))
		d.mapY.ConvertToWithParams(&cy, gocv.MatTypeCV32F, float32(fy), float32(0.5*fy-0.5))
		if err := fixedMaps(d.mapX, d.mapY, &d.fmapX, &d.fmapY); err != nil {
			return fmt.Errorf("detect: %w", err)
		}
		if err := fixedMaps(cx, cy, &d.cmapX, &d.cmapY); err != nil {
			return fmt.Errorf("detect: %w", err)
		}
		d.cmapFor, d.cmapReady = [2]int{p.ShiftX, p.ShiftY}, true
	}
	if err := yuvRemap(p, d.fmapX, d.fmapY, d.cmapX, d.cmapY, &d.py, &d.pcb, &d.pcr, &d.frame); err != nil {
		return fmt.Errorf("detect: %w", err)
	}
	return nil
}

// smooth blurs the rectified frame by cfg.Smooth.
func (d *meanVar) smooth() {
	sigma := d.cfg.Smooth / d.rect.Cell
	if sigma < 0.3 {
		return
	}
	k := 2*int(math.Ceil(2*sigma)) + 1
	gocv.GaussianBlur(d.frame, &d.blurred, image.Pt(k, k), sigma, sigma, gocv.BorderReplicate)
	d.frame, d.blurred = d.blurred, d.frame
}

func cErr(rc C.int, buf *[errBufLen]C.char, what string) error {
	if rc == 0 {
		return nil
	}
	return fmt.Errorf("%s: %s", what, C.GoString(&buf[0]))
}

func (d *meanVar) accumulate(a float64) error {
	return poolAccumulate(d.frame, &d.short, a)
}

func (d *meanVar) measureGain(img gocv.Mat) error {
	cell := max(1, int(math.Round(d.cfg.LightCell/d.rect.Cell)))
	return poolGain(img, d.mean, d.weight, cell, 0.25, &d.gain)
}

func (d *meanVar) update(img gocv.Mat, noise, aMean, aSlow float64, learn bool) error {
	p := poolParams{noise2: noise * noise, aMean: aMean, aSlow: aSlow, learnBelow: d.cfg.Low,
		varClip: varClip, varGain: varGain, glintMin: glintMin, learn: learn}
	return poolUpdate(img, &d.mean, &d.vari, d.gain, d.water, d.hold, d.extra, d.glint, p, &d.score, &d.contrast)
}

// poolAccumulate sets short += a (frame − short), frame CV_8UC3 and short
// CV_32FC3 of its size (made so when it is not); see sw_pool_accumulate.
func poolAccumulate(frame gocv.Mat, short *gocv.Mat, a float64) error {
	var buf [errBufLen]C.char
	return cErr(C.sw_pool_accumulate(unsafe.Pointer(frame.Ptr()), unsafe.Pointer(short.Ptr()), C.double(a), &buf[0], errBufLen), &buf, "short mean")
}

// poolGain writes the local illumination ratio of short to mean into
// gain; see sw_pool_gain.
func poolGain(short, mean, weight gocv.Mat, cellPx int, minShare float64, gain *gocv.Mat) error {
	var buf [errBufLen]C.char
	return cErr(C.sw_pool_gain(unsafe.Pointer(short.Ptr()), unsafe.Pointer(mean.Ptr()), unsafe.Pointer(weight.Ptr()),
		C.int(cellPx), C.double(minShare), unsafe.Pointer(gain.Ptr()), &buf[0], errBufLen), &buf, "illumination")
}

// poolGlint updates the glint rate of frame's pixels (rate CV_32FC1,
// prev CV_8UC1, made so when they are not); see sw_pool_glint.
func poolGlint(frame gocv.Mat, rate, prev *gocv.Mat, a float64, level int) error {
	var buf [errBufLen]C.char
	return cErr(C.sw_pool_glint(unsafe.Pointer(frame.Ptr()), unsafe.Pointer(rate.Ptr()), unsafe.Pointer(prev.Ptr()), C.double(a), C.int(level), &buf[0], errBufLen), &buf, "glints")
}

// poolParams are the settings of one poolUpdate; see SwPoolParams in
// shim.h.
type poolParams struct {
	noise2, aMean, aSlow, learnBelow float64
	varClip, varGain, glintMin       float32
	learn                            bool
}

// poolUpdate scores img against the model and, with p.learn, teaches it;
// see sw_pool_update. extra and glint may be empty.
func poolUpdate(img gocv.Mat, mean, vari *gocv.Mat, gain, water, hold, extra, glint gocv.Mat, p poolParams, score, contrast *gocv.Mat) error {
	var buf [errBufLen]C.char
	cp := C.SwPoolParams{noise2: C.double(p.noise2), aMean: C.double(p.aMean), aSlow: C.double(p.aSlow), learnBelow: C.double(p.learnBelow),
		varClip: C.float(p.varClip), varGain: C.float(p.varGain), glintMin: C.float(p.glintMin)}
	if p.learn {
		cp.learn = 1
	}
	return cErr(C.sw_pool_update(unsafe.Pointer(img.Ptr()), unsafe.Pointer(mean.Ptr()), unsafe.Pointer(vari.Ptr()),
		unsafe.Pointer(gain.Ptr()), unsafe.Pointer(water.Ptr()), unsafe.Pointer(hold.Ptr()),
		unsafe.Pointer(extra.Ptr()), unsafe.Pointer(glint.Ptr()), cp,
		unsafe.Pointer(score.Ptr()), unsafe.Pointer(contrast.Ptr()), &buf[0], errBufLen), &buf, "score")
}

// structure sets the extra variance at structure in the background: the
// squared change a shift of cfg.Shift would make there (a gradient of the
// mean times the shift), for camera shake and for lane lines and walls
// seen through rippling water.
func (d *meanVar) structure() {
	gocv.Sobel(d.mean, &d.gx, gocv.MatTypeCV32F, 1, 0, 3, 1.0/8, 0, gocv.BorderReplicate)
	gocv.Sobel(d.mean, &d.gy, gocv.MatTypeCV32F, 0, 1, 3, 1.0/8, 0, gocv.BorderReplicate)
	gocv.Multiply(d.gx, d.gx, &d.gx)
	gocv.Multiply(d.gy, d.gy, &d.gy)
	gocv.Add(d.gx, d.gy, &d.extra)
	s := d.cfg.Shift / d.rect.Cell
	d.extra.MultiplyFloat(float32(s * s))
}

// structureEvery is how often, in frames, the structure term is
// recomputed: the mean it comes from changes slowly.
const structureEvery = 5

// Glints: a cell whose unblurred pixel reaches glintLevel (the mixture
// detector's, detector.go) in some channel glints in that frame; one that
// starts or stops glinting in glintMin of the frames of the last glintTime
// is glittering water, where only a darkening may be a body. A bright body
// glints steadily, and scores.
const (
	glintMin  = 0.08
	glintTime = 3 * time.Second
)

// paintHold marks the hold boxes (grid cells) as not to be learned.
func (d *meanVar) paintHold(hold []image.Rectangle) {
	d.hold.SetTo(gocv.NewScalar(0, 0, 0, 0))
	bounds := image.Rect(0, 0, d.size.X, d.size.Y)
	for _, r := range hold {
		r = r.Inset(-2).Intersect(bounds)
		if !r.Empty() {
			gocv.Rectangle(&d.hold, r, white, -1)
		}
	}
}

// Detect rectifies the frame, updates the model and returns the
// candidates. hold are boxes in grid cells (PlaneBlob.Cells of tracked
// candidates) whose cells are not learned, so that a still child is never
// absorbed.
func (d *meanVar) Detect(frame gocv.Mat, hold []image.Rectangle) ([]Blob, FrameStats, error) {
	d.clock.start()
	if err := d.rectify(frame); err != nil {
		return nil, FrameStats{}, err
	}
	d.clock.lap(StageRectify)
	return d.detect(hold)
}

// DetectPlanes is Detect for a frame given as its decoder's planes.
func (d *meanVar) DetectPlanes(p decode.Planes, hold []image.Rectangle) ([]Blob, FrameStats, error) {
	d.clock.start()
	if err := d.rectifyPlanes(p); err != nil {
		return nil, FrameStats{}, err
	}
	d.clock.lap(StageRectify)
	return d.detect(hold)
}

// detect is Detect after the frame is on the grid.
func (d *meanVar) detect(hold []image.Rectangle) ([]Blob, FrameStats, error) {
	var st FrameStats
	if err := poolGlint(d.frame, &d.glint, &d.glintPrev, d.cfg.rate(glintTime), glintLevel); err != nil {
		return nil, st, err
	}
	d.smooth()
	st.MeanLevel = meanOf(d.frame, d.water)
	d.shortN++
	aShort := math.Max(d.cfg.rate(d.cfg.Short), 1/float64(d.shortN))
	if err := d.accumulate(aShort); err != nil {
		return nil, st, err
	}
	warm := d.cfg.frames(d.cfg.WarmUp)
	aMean, aSlow := d.cfg.rate(d.cfg.Learn), d.cfg.rate(d.cfg.Absorb)
	learn := true
	switch {
	case d.frames < warm:
		// Warming up: every cell learns, as a running average.
		st.WarmingUp = true
		if d.frames == 0 {
			d.short.CopyTo(&d.mean)
		}
		a := 1 / float64(d.frames+1)
		aMean, aSlow = math.Max(aMean, a), math.Max(aSlow, a)
		d.hold.SetTo(gocv.NewScalar(0, 0, 0, 0))
	case d.relearn > 0:
		st.Relearning = true
		aMean, aSlow = 0.2, 0.2
		d.relearn--
		d.paintHold(hold)
	default:
		d.paintHold(hold)
	}
	if d.shortN < d.cfg.frames(d.cfg.Settle) && (d.ref != nil && d.frames >= warm || d.settling) {
		// Started from a reference, or back after a gap: fill the short
		// mean first, learn nothing.
		st.WarmingUp = true
		learn = false
	} else {
		d.settling = false
	}
	// The light is measured on the water minus last frame's candidates.
	gocv.BitwiseNot(d.fg, &d.weight)
	gocv.BitwiseAnd(d.weight, d.water, &d.weight)
	if d.frames > 0 {
		if err := d.measureGain(d.short); err != nil {
			return nil, st, err
		}
	}
	if d.frames%structureEvery == 0 {
		d.structure()
	}
	if err := d.update(d.short, d.cfg.Noise, aMean, aSlow, learn); err != nil {
		return nil, st, err
	}
	if learn {
		d.frames++
	}
	d.clock.lap(StageModel)
	if st.WarmingUp {
		d.fg.SetTo(gocv.NewScalar(0, 0, 0, 0))
		return nil, st, nil
	}
	gocv.Threshold(d.score, &d.thresh, float32(d.cfg.Low), 255, gocv.ThresholdBinary)
	d.thresh.ConvertTo(&d.lo, gocv.MatTypeCV8U)
	if d.waterArea > 0 {
		st.ForegroundFraction = float64(gocv.CountNonZero(d.lo)) / float64(d.waterArea)
	}
	if st.ForegroundFraction > 0.35 {
		// Most of the water changed at once (the light, the camera's
		// exposure): relearn quickly rather than report it.
		st.SceneChange = true
		d.relearn = max(d.relearn, d.cfg.frames(time.Second))
		d.fg.SetTo(gocv.NewScalar(0, 0, 0, 0))
		return nil, st, nil
	}
	if st.Relearning {
		d.fg.SetTo(gocv.NewScalar(0, 0, 0, 0))
		return nil, st, nil
	}
	if d.kJoin.Rows() > 1 {
		gocv.MorphologyEx(d.lo, &d.lo, gocv.MorphClose, d.kJoin)
		gocv.BitwiseAnd(d.lo, d.water, &d.lo)
	}
	blobs, err := d.candidates()
	if err != nil {
		return nil, st, err
	}
	gocv.Dilate(d.lo, &d.fg, d.kGrow)
	d.clock.lap(StageCandidates)
	if d.clock != nil {
		d.clock.Frames++
	}
	return blobs, st, nil
}

// meanOf is the mean grey level of img inside mask.
func meanOf(img, mask gocv.Mat) float64 {
	m := img.MeanWithMask(mask)
	if img.Channels() == 3 {
		return (m.Val1 + m.Val2 + m.Val3) / 3
	}
	return m.Val1
}

// candidates labels the thresholded score and measures every component
// that has a core.
func (d *meanVar) candidates() ([]Blob, error) {
	n := gocv.ConnectedComponentsWithStats(d.lo, &d.labels, &d.stats, &d.cents)
	if n <= 1 {
		return nil, nil
	}
	lb, err := d.labels.DataPtrUint8()
	if err != nil {
		return nil, err
	}
	if d.labels.Type() != gocv.MatTypeCV32S || len(lb) < 4 {
		return nil, fmt.Errorf("labels: type %v", d.labels.Type())
	}
	lab := unsafe.Slice((*int32)(unsafe.Pointer(&lb[0])), len(lb)/4)
	sc, err := d.score.DataPtrFloat32()
	if err != nil {
		return nil, err
	}
	con, err := d.contrast.DataPtrFloat32()
	if err != nil {
		return nil, err
	}
	sh, err := d.short.DataPtrFloat32()
	if err != nil {
		return nil, err
	}
	mn, err := d.mean.DataPtrFloat32()
	if err != nil {
		return nil, err
	}
	gn, err := d.gain.DataPtrFloat32()
	if err != nil {
		return nil, err
	}
	fr, err := d.frame.DataPtrUint8()
	if err != nil {
		return nil, err
	}
	cell := d.rect.Cell
	cellArea := cell * cell
	hd, err := d.hold.DataPtrUint8()
	if err != nil {
		return nil, err
	}
	thr := float32(d.cfg.Threshold)
	w := d.size.X
	var out []Blob
	for k := 1; k < n; k++ {
		area := int(d.stats.GetIntAt(k, int(gocv.CC_STAT_AREA)))
		if area < 2 {
			continue
		}
		bx := int(d.stats.GetIntAt(k, int(gocv.CC_STAT_LEFT)))
		by := int(d.stats.GetIntAt(k, int(gocv.CC_STAT_TOP)))
		bw := int(d.stats.GetIntAt(k, int(gocv.CC_STAT_WIDTH)))
		bh := int(d.stats.GetIntAt(k, int(gocv.CC_STAT_HEIGHT)))
		var cnt, core, chromaN, held int
		var diff [3]float64 // summed difference from the expected water over the core, B, G, R
		var sx, sy, sxx, syy, sxy, ssum, conSum, chroma, waterChroma float64
		var peak float32
		for y := by; y < by+bh; y++ {
			for x := bx; x < bx+bw; x++ {
				i := y*w + x
				if lab[i] != int32(k) {
					continue
				}
				s := sc[i]
				cnt++
				d.scores = append(d.scores, s)
				if s >= thr {
					core++
				}
				if hd[i] != 0 {
					held++
				}
				peak = max(peak, s)
				ssum += float64(s)
				conSum += float64(con[i])
				fx, fy := float64(x)+0.5, float64(y)+0.5
				sx += fx
				sy += fy
				sxx += fx * fx
				syy += fy * fy
				sxy += fx * fy
				// Chromaticity of the short mean against the expected water,
				// over the core, where the candidate is most itself.
				if s < thr {
					continue
				}
				var a, b [3]float64
				var sa, sb float64
				for c := 0; c < 3; c++ {
					a[c] = float64(sh[3*i+c])
					b[c] = float64(gn[3*i+c] * mn[3*i+c])
					sa += a[c]
					sb += b[c]
				}
				for c := 0; c < 3; c++ {
					diff[c] += a[c] - b[c]
				}
				if sa > 1 && sb > 1 {
					var dd, dw float64
					for c := 0; c < 3; c++ {
						e := a[c]/sa - b[c]/sb
						dd += e * e
						g := b[c]/sb - 1.0/3
						dw += g * g
					}
					chroma += math.Sqrt(dd)
					waterChroma += math.Sqrt(dw)
					chromaN++
					d.chromas = append(d.chromas, math.Sqrt(dd))
				}
			}
		}
		// A component with no core is kept only inside a hold box, and
		// only while it is well above the noise: a tracked body that dims
		// (a cloud over a still child) stays found.
		faint := core == 0 && 2*held >= cnt && peak >= keepPeak*thr
		if cnt == 0 || core == 0 && !faint {
			d.chromas = d.chromas[:0]
			d.scores = d.scores[:0]
			continue
		}
		// The area at a quarter of the peak score (half its contrast):
		// close to the object's own outline, where Area also counts the
		// blur around it.
		half, bright, wet := 0, 0, 0
		var hx, hy, rx, ry, nowDiff, meanDiff, nx, ny float64
		nn := 0
		hthr := max(float32(d.cfg.Low), peak/4)
		// rx, ry: the centre of the part at a quarter of the score a
		// tenth of the cells reach, where the candidate is reported
		// (Features.ShiftX).
		pthr := max(float32(d.cfg.Low), topScore(d.scores)/4)
		d.scores = d.scores[:0]
		pn, trail := 0, false
		for y := by; y < by+bh; y++ {
			for x := bx; x < bx+bw; x++ {
				i := y*w + x
				if lab[i] != int32(k) {
					continue
				}
				var now, was float64
				for c := 0; c < 3; c++ {
					e := float64(gn[3*i+c] * mn[3*i+c])
					now += math.Abs(float64(fr[3*i+c]) - e)
					was += math.Abs(float64(sh[3*i+c]) - e)
				}
				if now >= nowShare*was {
					nx += float64(x) + 0.5
					ny += float64(y) + 0.5
					nn++
				}
				if sc[i] >= pthr {
					pn++
					rx += float64(x) + 0.5
					ry += float64(y) + 0.5
				}
				if sc[i] >= hthr {
					half++
					hx += float64(x) + 0.5
					hy += float64(y) + 0.5
					nowDiff += now
					meanDiff += was
				}
				if con[i] > 0 {
					bright++
				}
				wet += int(d.wet[i])
			}
		}
		// The tint of the difference: light added to the water (a glint, a
		// reflection) is white, a body has colours of its own.
		tint := 0.0
		if sd := diff[0] + diff[1] + diff[2]; math.Abs(sd) > 1 {
			var t2 float64
			for c := 0; c < 3; c++ {
				e := diff[c]/sd - 1.0/3
				t2 += e * e
			}
			tint = 100 * math.Sqrt(t2)
		}
		slices.Sort(d.chromas)
		top := 0.0
		if n := len(d.chromas); n > 0 {
			q := d.chromas[n-max(1, n/4):]
			for _, v := range q {
				top += v
			}
			top /= float64(len(q))
		}
		d.chromas = d.chromas[:0]
		fc := float64(cnt)
		cx, cy := sx/fc, sy/fc
		vxx, vyy, vxy := sxx/fc-cx*cx, syy/fc-cy*cy, sxy/fc-cx*cy
		tr, det := vxx+vyy, vxx*vyy-vxy*vxy
		disc := math.Sqrt(math.Max(0, tr*tr/4-det))
		l1, l2 := tr/2+disc, math.Max(0, tr/2-disc)
		f := Features{
			Area:      fc * cellArea,
			Core:      float64(core) * cellArea,
			Score:     ssum / fc,
			Peak:      float64(peak),
			Contrast:  conSum / fc,
			Chroma:    100 * chroma / math.Max(1, float64(chromaN)),
			Water:     100 * waterChroma / math.Max(1, float64(chromaN)),
			ChromaTop: 100 * top,
			Half:      float64(half) * cellArea,
			Bright:    float64(bright) / fc,
			Wet:       float64(wet) / fc,
			Tint:      tint,
			// An ellipse's axis is 4 standard deviations; a cell adds its width.
			Length: (4*math.Sqrt(l1) + 1) * cell,
			Width:  (4*math.Sqrt(l2) + 1) * cell,
			Faint:  faint,
		}
		if meanDiff > 0 {
			f.Present = min(2, nowDiff/meanDiff)
		}
		var near *Point
		if half > 0 {
			// The position is that of the strongest part: where a body
			// and its shadow on the floor join, the body.
			cx, cy = hx/float64(half), hy/float64(half)
			f.Foot, near = d.foot(lab, int32(k), sc, hthr, image.Rect(bx, by, bx+bw, by+bh))
		}
		if f.Present < trailPresent && nn >= 2 && wet > 0 && wet < cnt {
			// Across the edge, mostly the trail the short mean holds of a
			// body that moved (a child stepping in): the body is where the
			// candidate is there in this frame; unless that lies beyond
			// the centre, away from the camera, where an upright body is
			// seen reaching over the plane. In open water the strongest
			// part stays the position: there, placing by this frame's part
			// put one target of the named child scene 0.68 m from the
			// child (0.45 m by its strongest part).
			if px, py := nx/float64(nn), ny/float64(nn); !d.fartherFromCamera(px, py, cx, cy) {
				cx, cy = px, py
				trail = true
			}
		}
		ci, cj := min(max(int(cx), 0), w-1), min(max(int(cy), 0), d.size.Y-1)
		f.Edge = float64(d.edge[cj*w+ci]) * cell
		px, py := d.rect.plane(cx, cy)
		if half > 0 && pn > 0 && !trail {
			qx, qy := d.rect.plane(rx/float64(pn), ry/float64(pn))
			f.ShiftX, f.ShiftY = qx-px, qy-py
		}
		cells := image.Rect(bx, by, bx+bw, by+bh)
		b := Blob{Pixels: cnt, Plane: &PlaneBlob{X: px, Y: py, Cells: cells, Near: near}, Features: f}
		if c, ok := d.rect.source(cx, cy); ok {
			b.Centroid = c
		}
		b.Box, b.Contour = d.sourceBox(cells)
		out = append(out, b)
	}
	return out, nil
}

// keepPeak is the share of Threshold the peak of a candidate without a
// core must reach to be kept in a hold box (Features.Faint).
const keepPeak = 0.5

// trailPresent and nowShare: a candidate across the water's edge less
// than trailPresent of which is there in the current frame
// (Features.Present) is mostly the trail of a body that moved, and is
// placed at its cells whose difference from the water in this frame is
// at least nowShare of that in the short mean. Measured on the
// development set's H4: a child stepping in over the edge was 0.06–0.17
// there in the frames before its centre crossed onto the water.
const (
	trailPresent = 0.4
	nowShare     = 0.5
)

// fartherFromCamera reports whether cell point (ax, ay) lies farther
// from the point under the camera than (bx, by); false when the camera's
// position is not known.
func (d *meanVar) fartherFromCamera(ax, ay, bx, by float64) bool {
	n := d.rect.Nadir
	if n == nil {
		return false
	}
	cell := d.rect.Cell
	nx, ny := (n.X-d.rect.OriginX)/cell, (n.Y-d.rect.OriginY)/cell
	return math.Hypot(ax-nx, ay-ny) > math.Hypot(bx-nx, by-ny)
}

// footBand is how far beyond a candidate's nearest point to the camera,
// m, its near end reaches (Features.Foot): about a foot's length.
const footBand = 0.15

// foot returns Features.Foot for component k (cells of lab within box
// scoring at least thr): the mean distance from the water of its cells
// within footBand of its nearest point to the camera's nadir, plane units;
// 0 when the nadir is not known; and the centre of those cells on the
// plane (nil when the nadir is not known).
func (d *meanVar) foot(lab []int32, k int32, sc []float32, thr float32, box image.Rectangle) (float64, *Point) {
	if d.rect.Nadir == nil || d.deckDepth == nil {
		return 0, nil
	}
	w := d.size.X
	cell := d.rect.Cell
	// The nadir in cell units.
	nx, ny := (d.rect.Nadir.X-d.rect.OriginX)/cell, (d.rect.Nadir.Y-d.rect.OriginY)/cell
	near := math.Inf(1)
	for y := box.Min.Y; y < box.Max.Y; y++ {
		for x := box.Min.X; x < box.Max.X; x++ {
			if i := y*w + x; lab[i] == k && sc[i] >= thr {
				near = min(near, math.Hypot(float64(x)+0.5-nx, float64(y)+0.5-ny))
			}
		}
	}
	band := near + footBand/cell
	var sum, sx, sy float64
	n := 0
	for y := box.Min.Y; y < box.Max.Y; y++ {
		for x := box.Min.X; x < box.Max.X; x++ {
			if i := y*w + x; lab[i] == k && sc[i] >= thr && math.Hypot(float64(x)+0.5-nx, float64(y)+0.5-ny) <= band {
				// A deck cell beside the water is half a cell from its edge.
				if dd := d.deckDepth[i]; dd > 0 {
					sum += float64(dd) - 0.5
				}
				sx += float64(x) + 0.5
				sy += float64(y) + 0.5
				n++
			}
		}
	}
	if n == 0 {
		return 0, nil
	}
	px, py := d.rect.plane(sx/float64(n), sy/float64(n))
	return sum / float64(n) * cell, &Point{X: px, Y: py}
}

// sourceBox returns the source-pixel bounding box of a box of cells and
// its outline, for drawing.
func (d *meanVar) sourceBox(cells image.Rectangle) (image.Rectangle, []Point) {
	corners := [][2]float64{{float64(cells.Min.X), float64(cells.Min.Y)}, {float64(cells.Max.X), float64(cells.Min.Y)},
		{float64(cells.Max.X), float64(cells.Max.Y)}, {float64(cells.Min.X), float64(cells.Max.Y)}}
	var poly []Point
	box := image.Rectangle{}
	for _, c := range corners {
		p, ok := d.rect.source(c[0], c[1])
		if !ok {
			continue
		}
		poly = append(poly, p)
		r := image.Rect(int(math.Floor(p.X)), int(math.Floor(p.Y)), int(math.Ceil(p.X))+1, int(math.Ceil(p.Y))+1)
		if box.Empty() {
			box = r
		} else {
			box = box.Union(r)
		}
	}
	return box, poly
}

// probe measures a frame after a (re)connect without learning from it:
// decoder fill grey, change since the previous probed frame, and the
// share of water that differs from the model under the local light.
func (d *meanVar) probe(frame gocv.Mat) (probeStats, error) {
	if err := d.rectify(frame); err != nil {
		return probeStats{Change: -1, Mismatch: -1}, err
	}
	return d.probeRectified()
}

// probePlanes is probe for a frame given as its decoder's planes, so that
// the probing compares what the model learned from.
func (d *meanVar) probePlanes(p decode.Planes) (probeStats, error) {
	if err := d.rectifyPlanes(p); err != nil {
		return probeStats{Change: -1, Mismatch: -1}, err
	}
	return d.probeRectified()
}

// probeRectified is probe once the frame is on the grid.
func (d *meanVar) probeRectified() (probeStats, error) {
	st := probeStats{Change: -1, Mismatch: -1}
	if d.waterArea == 0 {
		return st, nil
	}
	area := float64(d.waterArea)
	gocv.InRangeWithScalar(d.frame, gocv.NewScalar(fillLo, fillLo, fillLo, 0), gocv.NewScalar(fillHi, fillHi, fillHi, 0), &d.lo)
	gocv.BitwiseAnd(d.lo, d.water, &d.lo)
	gocv.Erode(d.lo, &d.lo, d.kFill)
	st.Fill = float64(gocv.CountNonZero(d.lo)) / area
	gocv.CvtColor(d.frame, &d.gray, gocv.ColorBGRToGray)
	if !d.prev.Empty() {
		gocv.AbsDiff(d.gray, d.prev, &d.lo)
		gocv.Threshold(d.lo, &d.lo, rejoinStep, 255, gocv.ThresholdBinary)
		gocv.BitwiseAnd(d.lo, d.water, &d.lo)
		st.Change = float64(gocv.CountNonZero(d.lo)) / area
	}
	d.gray.CopyTo(&d.prev)
	if d.frames >= d.cfg.frames(d.cfg.WarmUp) {
		d.frame.ConvertTo(&d.probeF, gocv.MatTypeCV32FC3)
		d.water.CopyTo(&d.weight)
		if err := d.measureGain(d.probeF); err != nil {
			return st, err
		}
		// A single frame is not averaged: allow for caustics' flicker.
		if err := d.update(d.probeF, probeNoise, 0, 0, false); err != nil {
			return st, err
		}
		gocv.Threshold(d.score, &d.thresh, float32(d.cfg.Low), 255, gocv.ThresholdBinary)
		d.thresh.ConvertTo(&d.hi, gocv.MatTypeCV8U)
		st.Mismatch = float64(gocv.CountNonZero(d.hi)) / area
	}
	return st, nil
}

// varClip bounds what one frame's squared residual counts for in the
// variance (as a multiple of the variance plus the noise floor); varGain
// is how much faster than the mean the variance learns, so that a gust's
// rougher water is learned within seconds.
const (
	varClip = 9
	varGain = 3
)

// probeNoise is the noise floor, grey levels, for comparing one raw frame
// with the model during probing.
const probeNoise = 12

func (d *meanVar) reset() error { return d.restart() }

// resume starts the short mean again after a gap in the frames, keeping
// the learned background: the last second before the gap (a child who has
// since left, the picture of a camera that went down) must not be
// averaged into the first frames after it.
func (d *meanVar) resume() error {
	d.shortN, d.settling = 0, true
	d.fg.SetTo(gocv.NewScalar(0, 0, 0, 0))
	return nil
}

// Close frees every Mat. Safe to call twice.
func (d *meanVar) Close() error {
	if d.closed {
		return nil
	}
	d.closed = true
	for _, m := range []*gocv.Mat{&d.mapX, &d.mapY, &d.water, &d.frame, &d.blurred, &d.thresh, &d.short, &d.mean, &d.vari, &d.gain, &d.glint, &d.glintPrev, &d.extra, &d.gx, &d.gy, &d.score, &d.contrast,
		&d.weight, &d.hold, &d.lo, &d.hi, &d.fg, &d.labels, &d.stats, &d.cents, &d.kJoin, &d.kGrow, &d.kFill, &d.gray, &d.prev, &d.probeF, &d.scratch,
		&d.fmapX, &d.fmapY, &d.cmapX, &d.cmapY, &d.py, &d.pcb, &d.pcr} {
		m.Close()
	}
	return nil
}

// Reference returns the camera's current background as an empty-pool
// reference, for saving; false for the mixture-model detectors and while
// the model is still warming up. Call it only while nothing is tracked:
// whatever is in the water now becomes part of the reference.
func (c *Camera) Reference() (Reference, bool) {
	if mv, ok := c.det.(*meanVar); ok && !c.closed {
		return mv.Reference()
	}
	return Reference{}, false
}

// topScore is the score a tenth of the cells reach (nearest rank): the
// candidate's peak contrast, as a level most of its brightest part
// shares rather than its single highest cell. It sorts scores.
func topScore(scores []float32) float32 {
	if len(scores) == 0 {
		return 0
	}
	slices.Sort(scores)
	return scores[int(math.Ceil(0.9*float64(len(scores))))-1]
}
