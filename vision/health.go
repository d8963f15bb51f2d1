package vision

import (
	"bytes"
	"fmt"
	"image"
	"math"
	"slices"
	"time"

	"gocv.io/x/gocv"

	"stillwater/vision/decode"
)

// HealthStats are cheap whole-frame statistics for telling a working camera
// from a blinded, covered, frozen or noise-only one. Grey levels are 0–255,
// measured on the frame scaled to healthWidth pixels wide.
type HealthStats struct {
	// Mean is the mean grey level.
	Mean float64
	// Spread is the standard deviation of the grey level.
	Spread float64
	// HasPrev is false for the first frame after opening or reconnecting;
	// Diff is then meaningless.
	HasPrev bool
	// Diff is the mean absolute grey difference to the previous frame,
	// whole frame.
	Diff float64
	// HasMotion is false until a frame at least MotionLag older than this
	// one has been seen since opening or reconnecting; Motion is then
	// meaningless.
	HasMotion bool
	// Motion is how much the watched area (the water) changed since the
	// frame MotionLag earlier: the mean absolute grey difference over its
	// least-changed 90 % of cells. Live water always moves; a frozen
	// picture re-encoded at each key frame changes only at those key
	// frames. Trimming the most-changed tenth keeps a clock burned into
	// the picture, or any small overlay, from passing for live water.
	Motion float64
	// Changed is the share of the watched cells whose source pixel at the
	// cell's centre, taken as it is (not averaged), differs in any channel
	// from the frame before. A live camera's sensor noise reaches some
	// pixels of every frame even where the water is too calm to move the
	// averaged probe; a frozen picture's encoder sends next to no change
	// between its key frames. HasChanged is false when there was no frame
	// before to compare with.
	Changed    float64
	HasChanged bool
	// Correlation is the mean Pearson correlation between each pixel and its
	// right and lower neighbours, −1…1; 0 for a flat frame. Camera images
	// of real scenes are strongly correlated at this scale, independent
	// pixel noise is not.
	Correlation float64
}

// healthWidth is the width frames are scaled to for HealthStats, px.
const healthWidth = 160

// MotionLag is how far apart, media time, the two frames are whose
// difference gives HealthStats.Motion. Comparing frames a fixed time apart
// rather than consecutive frames makes the measure the same at 5 fps and at
// 30 fps: water moves in time, not in frames.
const MotionLag = 200 * time.Millisecond

// motionKeep is the share of the watched cells, least changed first, that
// Motion averages over.
const motionKeep = 0.9

// probeFrame is one earlier probe-size grey frame and its media time.
type probeFrame struct {
	t    time.Duration
	grey []byte
}

// healthProbe owns the Mats HealthStats are measured with.
type healthProbe struct {
	small, gray gocv.Mat
	ready       bool
	prev        []byte // previous frame at probe size, grey
	hasPrev     bool
	// past holds the recent probe frames, oldest first, back to the newest
	// one at least MotionLag old.
	past []probeFrame
	// mask is the watched area in source pixels; empty watches the whole
	// frame. cells are the probe-size pixel indices inside it for the
	// source and probe sizes in cellsFor.
	mask     []Point
	cells    []int
	cellsFor [2]image.Point
	// at are the byte offsets in the source frame of the pixels at the
	// watched cells' centres (for a frame of atStep bytes a row, atCh
	// channels), and samples their values in the frame before (atCh
	// bytes each; empty when there was none).
	at            []int
	atStep, atCh  int
	samples, next []byte
}

func (p *healthProbe) init() {
	p.small, p.gray = gocv.NewMat(), gocv.NewMat()
	p.ready = true
}

// watch sets the area whose motion tells a live picture from a frozen one,
// a polygon in source pixels; empty watches the whole frame.
func (p *healthProbe) watch(mask []Point) {
	p.mask = append([]Point(nil), mask...)
	p.cells, p.cellsFor = nil, [2]image.Point{}
}

// reset forgets the previous frames, so that a reconnect is not mistaken
// for a change or a freeze.
func (p *healthProbe) reset() {
	p.hasPrev = false
	p.past = p.past[:0]
	p.samples = p.samples[:0]
}

// measure computes the statistics of frame (BGR or grey) at media time t
// and remembers it for the next frames.
func (p *healthProbe) measure(frame gocv.Mat, t time.Duration) HealthStats {
	if !p.ready {
		p.init()
	}
	src := image.Pt(frame.Cols(), frame.Rows())
	size := probeSize(src)
	if size != src {
		p.shrink(frame, src, size)
	} else {
		frame.CopyTo(&p.small)
	}
	if p.small.Channels() == 3 {
		gocv.CvtColor(p.small, &p.gray, gocv.ColorBGRToGray)
	} else {
		p.small.CopyTo(&p.gray)
	}
	cur := p.gray.ToBytes()
	p.sizes(src, size)
	changed, has := p.fineChange(frame, src, size)
	return p.finish(cur, size, changed, has, t)
}

// measurePlanes is measure for a frame given as its decoder's planes: the
// grey probe is the Y plane's, averaged down, and the fine change is
// judged on the three planes' bytes at the cells' centres.
func (p *healthProbe) measurePlanes(v decode.Planes, t time.Duration) (HealthStats, error) {
	if !p.ready {
		p.init()
	}
	src := v.Size
	size := probeSize(src)
	if err := planeGrey(v, size, &p.gray); err != nil {
		return HealthStats{}, fmt.Errorf("picture checks: %w", err)
	}
	cur := p.gray.ToBytes()
	p.sizes(src, size)
	changed, has := p.fineChangePlanes(v, src, size)
	return p.finish(cur, size, changed, has, t), nil
}

// probeSize is the probe's size for frames of size src.
func probeSize(src image.Point) image.Point {
	if src.X <= healthWidth {
		return src
	}
	return image.Pt(healthWidth, max(1, int(math.Round(float64(src.Y)*healthWidth/float64(src.X)))))
}

// sizes sets up the watched cells for frames of size src probed at size.
func (p *healthProbe) sizes(src, size image.Point) {
	if p.cellsFor != [2]image.Point{src, size} {
		p.cells = maskCells(p.mask, src, size)
		p.cellsFor = [2]image.Point{src, size}
		p.at, p.atStep = p.at[:0], 0
		p.hasPrev = false // a new size: nothing earlier compares
		p.past = p.past[:0]
	}
}

// finish computes the statistics of the grey probe cur and remembers it.
func (p *healthProbe) finish(cur []byte, size image.Point, changed float64, hasChanged bool, t time.Duration) HealthStats {
	var st HealthStats
	st.HasPrev = p.hasPrev && len(p.prev) == len(cur)
	var prev []byte
	if st.HasPrev {
		prev = p.prev
	}
	st.Changed, st.HasChanged = changed, hasChanged
	st.Mean, st.Spread, st.Diff, st.Correlation = greyStats(cur, prev, size.X, size.Y)
	// The newest earlier frame at least MotionLag old, dropping the ones
	// before it: they will never be the newest such frame again.
	old := -1
	for i, f := range p.past {
		if t-f.t >= MotionLag {
			old = i
		}
	}
	if old >= 0 {
		st.HasMotion = true
		st.Motion = trimmedChange(cur, p.past[old].grey, p.cells, motionKeep)
		p.past = append(p.past[:0], p.past[old:]...)
	}
	p.past = append(p.past, probeFrame{t: t, grey: cur})
	p.prev = cur
	p.hasPrev = true
	return st
}

// fineChange returns HealthStats.Changed for frame and keeps its samples
// for the next frame; false when there is nothing to compare with (the
// first frame, another layout) or the frame cannot be read in place.
func (p *healthProbe) fineChange(frame gocv.Mat, src, size image.Point) (float64, bool) {
	ch, step := frame.Channels(), frame.Step()
	data, err := frame.DataPtrUint8()
	if err != nil || !frame.IsContinuous() || frame.Type()&7 != gocv.MatTypeCV8U {
		p.samples = p.samples[:0]
		return 0, false
	}
	if p.atStep != step || p.atCh != ch || len(p.at) == 0 && len(p.cells) > 0 {
		sx, sy := float64(src.X)/float64(size.X), float64(src.Y)/float64(size.Y)
		p.at = p.at[:0]
		for _, c := range p.cells {
			x := min(src.X-1, int((float64(c%size.X)+0.5)*sx))
			y := min(src.Y-1, int((float64(c/size.X)+0.5)*sy))
			p.at = append(p.at, y*step+x*ch)
		}
		p.atStep, p.atCh = step, ch
		p.samples = p.samples[:0]
	}
	p.next = p.next[:0]
	for _, o := range p.at {
		if o+ch > len(data) {
			p.samples = p.samples[:0]
			return 0, false
		}
		p.next = append(p.next, data[o:o+ch]...)
	}
	return p.changedShare(ch)
}

// changedShare compares the samples just taken (next, ch bytes a cell)
// with the frame before's, keeps them for the next frame, and returns the
// share of cells with any byte changed; false when there was nothing to
// compare with.
func (p *healthProbe) changedShare(ch int) (float64, bool) {
	had := len(p.samples) == len(p.next) && len(p.next) > 0
	n, cells := 0, len(p.next)/ch
	if had {
		for i := 0; i+ch <= len(p.next); i += ch {
			if !bytes.Equal(p.next[i:i+ch], p.samples[i:i+ch]) {
				n++
			}
		}
	}
	p.samples, p.next = p.next, p.samples
	if !had {
		return 0, false
	}
	return float64(n) / float64(cells), true
}

// fineChangePlanes is fineChange for a frame given as its decoder's
// planes: a cell changed when its centre's Y, Cb or Cr byte did.
func (p *healthProbe) fineChangePlanes(v decode.Planes, src, size image.Point) (float64, bool) {
	// atStep −1 marks offsets into the planes; atCh is unused then.
	const planar = -1
	if p.atStep != planar || len(p.at) == 0 && len(p.cells) > 0 {
		sx, sy := float64(src.X)/float64(size.X), float64(src.Y)/float64(size.Y)
		p.at = p.at[:0]
		for _, c := range p.cells {
			x := min(src.X-1, int((float64(c%size.X)+0.5)*sx))
			y := min(src.Y-1, int((float64(c/size.X)+0.5)*sy))
			p.at = append(p.at, x, y)
		}
		p.atStep, p.atCh = planar, 0
		p.samples = p.samples[:0]
	}
	p.next = p.next[:0]
	for i := 0; i+1 < len(p.at); i += 2 {
		x, y := p.at[i], p.at[i+1]
		cx, cy := x>>v.ShiftX, y>>v.ShiftY
		yo, bo, ro := y*v.YStep+x, cy*v.CStep[0]+cx, cy*v.CStep[1]+cx
		if yo >= len(v.Y) || bo >= len(v.Cb) || ro >= len(v.Cr) {
			p.samples = p.samples[:0]
			return 0, false
		}
		p.next = append(p.next, v.Y[yo], v.Cb[bo], v.Cr[ro])
	}
	return p.changedShare(3)
}

// maskCells returns the indices of the cells of a probe-size image whose
// centres fall inside poly (source pixels of a src-size frame), row by row;
// every cell when poly has fewer than three points or covers no cell
// centre.
func maskCells(poly []Point, src, size image.Point) []int {
	n := size.X * size.Y
	var out []int
	if len(poly) >= 3 {
		sx, sy := float64(src.X)/float64(size.X), float64(src.Y)/float64(size.Y)
		for y := 0; y < size.Y; y++ {
			for x := 0; x < size.X; x++ {
				if inPolygon(poly, (float64(x)+0.5)*sx, (float64(y)+0.5)*sy) {
					out = append(out, y*size.X+x)
				}
			}
		}
	}
	if len(out) == 0 {
		out = make([]int, n)
		for i := range out {
			out[i] = i
		}
	}
	return out
}

// inPolygon reports whether (x, y) is inside poly by the even-odd rule.
func inPolygon(poly []Point, x, y float64) bool {
	in := false
	j := len(poly) - 1
	for i := range poly {
		a, b := poly[i], poly[j]
		if (a.Y > y) != (b.Y > y) && x < (b.X-a.X)*(y-a.Y)/(b.Y-a.Y)+a.X {
			in = !in
		}
		j = i
	}
	return in
}

// trimmedChange is the mean absolute difference between cur and old over
// the given cells, counting only the keep share of them that changed
// least.
func trimmedChange(cur, old []byte, cells []int, keep float64) float64 {
	if len(cells) == 0 || len(cur) != len(old) {
		return 0
	}
	var hist [256]int
	for _, i := range cells {
		d := int(cur[i]) - int(old[i])
		if d < 0 {
			d = -d
		}
		hist[d]++
	}
	want := keep * float64(len(cells))
	var n, sum float64
	for d, c := range hist {
		if n >= want {
			break
		}
		take := math.Min(float64(c), want-n)
		n += take
		sum += take * float64(d)
	}
	if n == 0 {
		return 0
	}
	return sum / n
}

// greyStats returns the mean, standard deviation, mean absolute difference
// to prev (0 when prev is nil) and neighbour correlation of a w×h grey image
// stored row by row.
func greyStats(cur, prev []byte, w, h int) (mean, spread, diff, corr float64) {
	n := float64(len(cur))
	if n == 0 {
		return 0, 0, 0, 0
	}
	var sum, sum2, sad float64
	for i, v := range cur {
		f := float64(v)
		sum += f
		sum2 += f * f
		if prev != nil {
			d := f - float64(prev[i])
			sad += math.Abs(d)
		}
	}
	mean = sum / n
	spread = math.Sqrt(math.Max(0, sum2/n-mean*mean))
	if prev != nil {
		diff = sad / n
	}
	ch := pairCorrelation(cur, w, h, 1, 0)
	cv := pairCorrelation(cur, w, h, 0, 1)
	return mean, spread, diff, (ch + cv) / 2
}

// pairCorrelation is the Pearson correlation of the pixel pairs (x, y) and
// (x+dx, y+dy); 0 when either side has no variance.
func pairCorrelation(img []byte, w, h, dx, dy int) float64 {
	var sa, sb, saa, sbb, sab, n float64
	for y := 0; y+dy < h; y++ {
		row, next := img[y*w:], img[(y+dy)*w:]
		for x := 0; x+dx < w; x++ {
			a, b := float64(row[x]), float64(next[x+dx])
			sa += a
			sb += b
			saa += a * a
			sbb += b * b
			sab += a * b
			n++
		}
	}
	if n == 0 {
		return 0
	}
	va := saa/n - (sa/n)*(sa/n)
	vb := sbb/n - (sb/n)*(sb/n)
	if va <= 1e-9 || vb <= 1e-9 {
		return 0
	}
	return (sab/n - (sa/n)*(sb/n)) / math.Sqrt(va*vb)
}

// shrink averages frame (src pixels) down to size into p.small: through
// areaShrink, OpenCV's area resize bit for bit but two to three times
// faster, when src is a whole number above 2 of size across and down
// (480×270, 640×360, 1280×720, 1920×1080 and so on), else (or for a frame
// it refuses, one not 8-bit) through OpenCV's resize itself.
func (p *healthProbe) shrink(frame gocv.Mat, src, size image.Point) {
	if f := src.X / size.X; f > 2 && src.X == f*size.X && src.Y == f*size.Y {
		if err := areaShrink(frame, f, &p.small); err == nil {
			return
		}
	}
	gocv.Resize(frame, &p.small, size, 0, 0, gocv.InterpolationArea)
}

// Close frees the probe's Mats. Safe to call twice.
func (p *healthProbe) Close() {
	if !p.ready {
		return
	}
	p.ready = false
	p.small.Close()
	p.gray.Close()
}

// Condition is the state of a camera's picture.
type Condition string

// Conditions a HealthMonitor reports.
const (
	CondOK      Condition = "ok"
	CondDark    Condition = "dark"    // near black: lens blacked out, lights off, IR failed
	CondUniform Condition = "uniform" // nearly one level everywhere: covered, fogged, overexposed
	CondFrozen  Condition = "frozen"  // the water does not move: the picture is stuck
	CondNoise   Condition = "noise"   // uncorrelated pixels: no signal, a broken sensor
)

// HealthConfig sets the thresholds and hold times of a HealthMonitor. Zero
// fields take the defaults of DefaultHealth.
type HealthConfig struct {
	// DarkLevel: a mean grey level below this is dark.
	DarkLevel float64
	// UniformSpread: a standard deviation below this is uniform.
	UniformSpread float64
	// StillLevel: a frame whose water changed by at most this much
	// (HealthStats.Motion, grey levels) since MotionLag earlier is still.
	StillLevel float64
	// FineLevel and FineWindow: while the median HealthStats.Changed of
	// the still frames of the last FineWindow is above FineLevel, the
	// picture is live however still its water (the sensor's noise still
	// reaches its pixels) and is not called frozen. A frozen picture's
	// encoder changes next to nothing between key frames; a median, so
	// that the few frames after each key frame, where the encoder still
	// refines the picture, do not count.
	FineLevel  float64
	FineWindow time.Duration
	// FrozenShare of the frames of the last FrozenWindow being still
	// makes the picture frozen. A share, not every frame: a frozen
	// picture that the encoder re-codes at each key frame jumps once per
	// key frame.
	FrozenShare float64
	// FrozenWindow is the media time over which still frames are counted.
	FrozenWindow time.Duration
	// NoiseCorrelation: a neighbour correlation below this is noise.
	NoiseCorrelation float64
	// Hold is how long a fault must persist before it is reported, media
	// time.
	Hold time.Duration
	// FrozenHold is how long the picture must stay frozen before it is
	// reported; zero takes the default (1 s), not Hold, because the
	// window already spans most of a second.
	FrozenHold time.Duration
	// LivelyFor is how long the water must have been seen moving just
	// before it stops for the stop to count as a freeze.
	LivelyFor time.Duration
	// CalmMemory is how long still spells that ended on their own are
	// remembered; while any is, the frozen hold is half as long again as
	// the longest, up to MaxFrozenHold.
	CalmMemory    time.Duration
	MaxFrozenHold time.Duration
	// StuckShare of the frames of the last StuckWindow being the same
	// picture as the frame before, bit for bit at the probe's size, makes
	// the picture frozen whether or not the water was seen moving first:
	// a camera that freezes over calm water, where the still level cannot
	// tell, is found late but found. Key frames re-encoding a frozen
	// picture are why it is a share.
	StuckShare  float64
	StuckWindow time.Duration
	// Recover is how long the picture must be fine again before the fault
	// is cleared, media time.
	Recover time.Duration
}

// DefaultHealth returns the default thresholds. The dark, uniform and noise
// levels are set with margin against the synthetic scenes and the
// opencv-doc reference footage (see health_test.go). The still level sits
// between the least water motion measured on a live picture once its
// denoiser has settled (0.064 grey levels: calm night water under a strong
// temporal denoiser, H.264 at 1 Mbit/s) and a frozen picture's between key
// frames (at most 0.03 after its first 0.5 s); the share, window and holds
// report every fault within 3 s of its onset on a camera whose water moves.
func DefaultHealth() HealthConfig {
	return HealthConfig{
		DarkLevel:        8,
		UniformSpread:    2.5,
		StillLevel:       0.05,
		FineLevel:        0.01,
		FineWindow:       2 * time.Second,
		FrozenShare:      0.6,
		FrozenWindow:     1500 * time.Millisecond,
		NoiseCorrelation: 0.35,
		Hold:             2 * time.Second,
		FrozenHold:       time.Second,
		LivelyFor:        3 * time.Second,
		CalmMemory:       10 * time.Minute,
		MaxFrozenHold:    8 * time.Second,
		StuckShare:       0.7,
		StuckWindow:      10 * time.Second,
		Recover:          2 * time.Second,
	}
}

func (c HealthConfig) withDefaults() HealthConfig {
	d := DefaultHealth()
	if c.DarkLevel <= 0 {
		c.DarkLevel = d.DarkLevel
	}
	if c.UniformSpread <= 0 {
		c.UniformSpread = d.UniformSpread
	}
	if c.StillLevel <= 0 {
		c.StillLevel = d.StillLevel
	}
	if c.FrozenShare <= 0 {
		c.FrozenShare = d.FrozenShare
	}
	if c.FineLevel <= 0 {
		c.FineLevel = d.FineLevel
	}
	if c.FineWindow <= 0 {
		c.FineWindow = d.FineWindow
	}
	if c.FrozenWindow <= 0 {
		c.FrozenWindow = d.FrozenWindow
	}
	if c.NoiseCorrelation <= 0 {
		c.NoiseCorrelation = d.NoiseCorrelation
	}
	if c.Hold <= 0 {
		c.Hold = d.Hold
	}
	if c.Recover <= 0 {
		c.Recover = d.Recover
	}
	if c.FrozenHold <= 0 {
		c.FrozenHold = d.FrozenHold
	}
	if c.LivelyFor <= 0 {
		c.LivelyFor = d.LivelyFor
	}
	if c.CalmMemory <= 0 {
		c.CalmMemory = d.CalmMemory
	}
	if c.MaxFrozenHold <= 0 {
		c.MaxFrozenHold = d.MaxFrozenHold
	}
	if c.StuckShare <= 0 {
		c.StuckShare = d.StuckShare
	}
	if c.StuckWindow <= 0 {
		c.StuckWindow = d.StuckWindow
	}
	return c
}

// Validate reports a threshold that cannot work.
func (c HealthConfig) Validate() error {
	switch {
	case c.DarkLevel < 0 || c.DarkLevel > 255:
		return fmt.Errorf("health dark level %g: want 0–255", c.DarkLevel)
	case c.UniformSpread < 0 || c.UniformSpread > 128:
		return fmt.Errorf("health uniform spread %g: want 0–128", c.UniformSpread)
	case c.StillLevel < 0 || c.StillLevel > 255:
		return fmt.Errorf("health still level %g: want 0–255", c.StillLevel)
	case c.FineLevel < 0 || c.FineLevel > 1:
		return fmt.Errorf("health fine level %g: want 0–1", c.FineLevel)
	case c.FrozenShare < 0 || c.FrozenShare > 1:
		return fmt.Errorf("health frozen share %g: want 0–1", c.FrozenShare)
	case c.StuckShare < 0 || c.StuckShare > 1:
		return fmt.Errorf("health stuck share %g: want 0–1", c.StuckShare)
	case c.NoiseCorrelation < 0 || c.NoiseCorrelation > 1:
		return fmt.Errorf("health noise correlation %g: want 0–1", c.NoiseCorrelation)
	case c.Hold < 0 || c.Recover < 0 || c.FrozenHold < 0 || c.FrozenWindow < 0 || c.LivelyFor < 0 || c.CalmMemory < 0 || c.MaxFrozenHold < 0 || c.StuckWindow < 0 || c.FineWindow < 0:
		return fmt.Errorf("health hold %v / frozen hold %v / frozen window %v / recover %v: want non-negative", c.Hold, c.FrozenHold, c.FrozenWindow, c.Recover)
	}
	return nil
}

// Classify returns the condition one frame's statistics suggest, before
// any hold, with CondFrozen meaning only that this frame's water is still
// (the monitor decides over a window whether the picture is frozen).
// Darkness wins over uniformity, which wins over stillness (a frozen black
// picture is reported as dark), which wins over noise.
func (c HealthConfig) Classify(s HealthStats) Condition {
	c = c.withDefaults()
	switch {
	case s.Mean < c.DarkLevel:
		return CondDark
	case s.Spread < c.UniformSpread:
		return CondUniform
	case s.HasMotion && s.Motion <= c.StillLevel:
		return CondFrozen
	case s.Correlation < c.NoiseCorrelation:
		return CondNoise
	}
	return CondOK
}

// HealthReport is the monitor's state after a frame.
type HealthReport struct {
	// Condition is the reported condition (held).
	Condition Condition
	// Since is the media time the reported condition began (its first
	// frame, not the end of the hold).
	Since time.Duration
	// Changed is true on the frame where Condition changed.
	Changed bool
	// Frame is the condition of this frame, with frozen judged over the
	// window.
	Frame Condition
	// StillShare is the share of the window's frames whose water was
	// still; 0 until the window holds enough frames to judge.
	StillShare float64
}

// stillMark is one measured frame in the frozen window.
type stillMark struct {
	t     time.Duration
	still bool
}

func (s stillMark) at() time.Duration { return s.t }

// HealthMonitor turns per-frame statistics into a stable condition: a fault
// is reported once it has persisted for its hold and cleared once the
// picture has been fine for Recover. Pure Go; not safe for concurrent use.
type HealthMonitor struct {
	cfg       HealthConfig
	cur       Condition
	since     time.Duration
	cand      Condition
	candSince time.Duration
	hasCand   bool
	window    []stillMark // measured frames of the last FrozenWindow, oldest first
	// movingFrom is when the current run of frames with moving water
	// began, stillFrom when the current still spell began; -1 for none.
	movingFrom, stillFrom time.Duration
	eligible              bool        // the current still spell followed LivelyFor of moving water
	spells                []calmSpell // still spells that ended on their own, oldest first
	same                  []stillMark // frames of the last StuckWindow: still = the same picture as the frame before
	byStuck               bool        // the current still spell is a freeze only by the stuck rule
	// stillRun is when the water last stopped moving: the first measured
	// frame of the current run of still ones, through dips of moving
	// frames shorter than a third of FrozenWindow (a frozen picture's
	// encoder redraws it at each key frame); -1 when it is moving.
	// movedFrom is when the current dip began, -1 for none. Not stillFrom:
	// a calm spell lasts through a whole FrozenWindow of moving water and
	// through the stuck rule, so that a splash would still count as calm.
	stillRun, movedFrom time.Duration
	// quietFrom is when the frozen window's share of still frames last
	// reached FrozenShare, live sensor or not; -1 while it is below.
	quietFrom  time.Duration
	fine       []fineMark // still frames of the last FineWindow and their HealthStats.Changed
	fineSorted []float64  // scratch for the median
}

// fineMark is one still frame's HealthStats.Changed.
type fineMark struct {
	t time.Duration
	v float64
}

func (f fineMark) at() time.Duration { return f.t }

// NewHealthMonitor returns a monitor that starts in CondOK.
func NewHealthMonitor(cfg HealthConfig) *HealthMonitor {
	return &HealthMonitor{cfg: cfg.withDefaults(), cur: CondOK, movingFrom: -1, stillFrom: -1, quietFrom: -1, stillRun: -1, movedFrom: -1}
}

// Condition returns the reported condition.
func (m *HealthMonitor) Condition() Condition { return m.cur }

// StillSince returns when the water last stopped moving (live sensor or
// not); ok is false while it moves, or after a dark or uniform picture
// until the water is measured still again.
func (m *HealthMonitor) StillSince() (since time.Duration, ok bool) {
	return m.stillRun, m.stillRun >= 0
}

// minStillFrames is the fewest measured frames the window must hold before
// it can call the picture frozen.
const minStillFrames = 3

// frame judges one frame: dark, uniform and noise on its own statistics;
// frozen when enough of the window's frames were still, and the water was
// seen moving for LivelyFor just before. An encoder that drops the small
// changes of calm water sends a live picture that is as still between key
// frames as a frozen one: the monitor only calls a picture frozen when it
// stops after the water was seen moving, and it learns how long this
// camera's water stays still on its own (see frozenHold). A picture that
// has been the same bit for bit for most of StuckWindow is frozen however
// still the water was before (see stuck).
func (m *HealthMonitor) frame(t time.Duration, s HealthStats) (Condition, float64) {
	f, share := m.stillness(t, s)
	stuck := m.stuck(t, s, f)
	if stuck {
		f = CondFrozen
	}
	if m.byStuck && !stuck {
		// The picture changes again: a spell that only the stuck rule
		// made a freeze is one no longer, however still the water.
		m.eligible, m.byStuck = false, false
	}
	switch f {
	case CondFrozen:
		if m.stillFrom < 0 {
			m.stillFrom = t
			m.eligible = m.movingFrom >= 0 && t-m.movingFrom >= m.cfg.LivelyFor
			m.byStuck = false
		}
		if stuck && !m.eligible {
			m.eligible, m.byStuck = true, true
		}
		// A dip shorter than FrozenWindow does not end the spell.
		m.movingFrom = -1
		if !m.eligible {
			return CondOK, share
		}
	case CondOK, CondNoise:
		if f == CondNoise {
			m.movingFrom = -1
			m.stillFrom = -1
			break
		}
		if m.movingFrom < 0 {
			m.movingFrom = t
		}
		// The spell ends once the water has moved for a whole window.
		if m.stillFrom >= 0 && t-m.movingFrom >= m.cfg.FrozenWindow {
			m.calm(t, m.movingFrom-m.stillFrom)
			m.stillFrom = -1
		}
	default:
		m.stillFrom, m.movingFrom = -1, -1
	}
	return f, share
}

// stillSpell follows when the water last stopped moving (stillRun), one
// measured frame at a time.
func (m *HealthMonitor) stillSpell(t time.Duration, still bool) {
	switch {
	case still:
		m.movedFrom = -1
		if m.stillRun < 0 {
			m.stillRun = t
		}
	case m.movedFrom < 0:
		m.movedFrom = t
	}
	if m.movedFrom >= 0 && t-m.movedFrom >= m.cfg.FrozenWindow/3 {
		m.stillRun = -1
	}
}

// stuck tells whether StuckShare of the frames of the last StuckWindow
// were the same picture as the frame before (HealthStats.Diff exactly 0).
// A dark or uniform picture restarts the count, as it does the frozen
// window; the window must span most of StuckWindow.
func (m *HealthMonitor) stuck(t time.Duration, s HealthStats, f Condition) bool {
	if f == CondDark || f == CondUniform {
		m.same = m.same[:0]
		return false
	}
	if s.HasPrev {
		m.same = append(m.same, stillMark{t: t, still: s.Diff == 0})
	}
	m.same = keepSince(m.same, t-m.cfg.StuckWindow)
	if len(m.same) < minStillFrames || m.same[len(m.same)-1].t-m.same[0].t < m.cfg.StuckWindow*9/10 {
		return false
	}
	return float64(stillCount(m.same)) >= m.cfg.StuckShare*float64(len(m.same))
}

// keepSince drops the marks older than from (they are oldest first),
// reusing the slice.
func keepSince[M interface{ at() time.Duration }](marks []M, from time.Duration) []M {
	drop := 0
	for drop < len(marks) && marks[drop].at() < from {
		drop++
	}
	return append(marks[:0], marks[drop:]...)
}

// stillCount is how many of marks are still.
func stillCount(marks []stillMark) int {
	n := 0
	for _, w := range marks {
		if w.still {
			n++
		}
	}
	return n
}

// calmSpell is a still spell that ended with the water moving again.
type calmSpell struct{ end, dur time.Duration }

// calm records a still spell that ended at t after d; one longer than
// MaxFrozenHold is taken for a picture that froze and came back, not for
// calm water, and is not kept.
func (m *HealthMonitor) calm(t, d time.Duration) {
	if d > m.cfg.MaxFrozenHold {
		return
	}
	m.spells = append(m.spells, calmSpell{end: t, dur: d})
}

// frozenHold is how long a still picture must last at time t to be
// reported frozen: FrozenHold, or half as long again as this camera's
// longest still spell of the last CalmMemory that ended on its own, at
// most MaxFrozenHold.
func (m *HealthMonitor) frozenHold(t time.Duration) time.Duration {
	drop := 0
	for drop < len(m.spells) && t-m.spells[drop].end > m.cfg.CalmMemory {
		drop++
	}
	m.spells = append(m.spells[:0], m.spells[drop:]...)
	h := m.cfg.FrozenHold
	for _, sp := range m.spells {
		h = max(h, sp.dur*3/2)
	}
	return min(h, max(m.cfg.MaxFrozenHold, m.cfg.FrozenHold))
}

// stillness judges one frame: dark, uniform and noise on its own
// statistics; frozen when enough of the window's frames were still.
func (m *HealthMonitor) stillness(t time.Duration, s HealthStats) (Condition, float64) {
	f := m.cfg.Classify(s)
	switch {
	case f == CondDark || f == CondUniform:
		// A black or covered picture is still too; the window restarts so
		// that the picture coming back is not taken for a frozen one.
		m.window = m.window[:0]
		m.fine = m.fine[:0]
		m.quietFrom, m.stillRun, m.movedFrom = -1, -1, -1
		return f, 0
	case s.HasMotion:
		m.window = append(m.window, stillMark{t: t, still: f == CondFrozen})
		m.stillSpell(t, f == CondFrozen)
		if f == CondFrozen && s.HasChanged {
			m.fine = append(m.fine, fineMark{t: t, v: s.Changed})
		}
	}
	m.window = keepSince(m.window, t-m.cfg.FrozenWindow)
	m.fine = keepSince(m.fine, t-m.cfg.FineWindow)
	if len(m.window) == 0 {
		if f == CondFrozen {
			f = CondOK
		}
		return f, 0
	}
	share := float64(stillCount(m.window)) / float64(len(m.window))
	// The window must hold a few frames and span most of FrozenWindow: the
	// first frames after opening, and a camera's denoiser settling, are
	// not a frozen picture.
	span := m.window[len(m.window)-1].t - m.window[0].t
	full := len(m.window) >= minStillFrames && span >= m.cfg.FrozenWindow*2/3
	if !full {
		share = 0
	}
	switch {
	case !full || share < m.cfg.FrozenShare:
		m.quietFrom = -1
	case m.quietFrom < 0:
		m.quietFrom = t
	}
	switch {
	case full && share >= m.cfg.FrozenShare && m.cur != CondFrozen && m.liveSensor():
		// Calm water under a live sensor: not a frozen picture, and not a
		// calm spell to learn from either. Once a freeze is reported, only
		// water seen moving ends it: a frozen picture's encoder refining it
		// after each key frame can read as a live sensor for seconds (fault
		// seed 25: cleared 5.8 s into a 54 s freeze, raised again 6.5 s
		// later).
		return CondOK, share
	case full && share >= m.cfg.FrozenShare:
		return CondFrozen, share
	case f == CondFrozen:
		// A still frame among moving ones is not a frozen picture; judge
		// it for noise as any other.
		if s.Correlation < m.cfg.NoiseCorrelation {
			return CondNoise, share
		}
		return CondOK, share
	}
	return f, share
}

// liveSensor reports whether the median HealthStats.Changed of the still
// frames of the last FineWindow is above FineLevel (see HealthConfig).
func (m *HealthMonitor) liveSensor() bool {
	if len(m.fine) < minStillFrames {
		return false
	}
	m.fineSorted = m.fineSorted[:0]
	for _, f := range m.fine {
		m.fineSorted = append(m.fineSorted, f.v)
	}
	slices.Sort(m.fineSorted)
	n := len(m.fineSorted)
	med := m.fineSorted[n/2]
	if n%2 == 0 {
		med = (m.fineSorted[n/2-1] + med) / 2
	}
	return med > m.cfg.FineLevel
}

// Observe feeds one frame's statistics at media time t (non-decreasing).
func (m *HealthMonitor) Observe(t time.Duration, s HealthStats) HealthReport {
	f, share := m.frame(t, s)
	rep := HealthReport{Frame: f, StillShare: share}
	started := false // a new candidate's hold starts at this frame
	switch {
	case f == m.cur:
		m.hasCand = false
	case !m.hasCand:
		m.cand, m.candSince, m.hasCand = f, t, true
		started = true
	case f != m.cand && (m.cur != CondOK || f == CondOK || m.cand == CondOK):
		// A different candidate starts its own hold, except that from OK
		// one fault turning into another (dark fading into uniform) keeps
		// the fault's onset.
		m.cand, m.candSince = f, t
		started = true
	default:
		m.cand = f
	}
	if started && m.cand == CondFrozen && m.quietFrom >= 0 && t-m.quietFrom <= m.cfg.FineWindow {
		// The water stopped while the live-sensor test still called the
		// picture live: its median lags, and an encoder refining a frozen
		// picture for a moment after it froze keeps it up (fault seed 41:
		// 0.75 s). The hold counts from when the water stopped, if that
		// was within the test's own window; a calm live picture whose
		// sensor goes quiet long after its water stopped gets no credit.
		m.candSince = m.quietFrom
	}
	if m.hasCand {
		need := m.cfg.Hold
		switch m.cand {
		case CondOK:
			need = m.cfg.Recover
		case CondFrozen:
			need = m.frozenHold(t)
		}
		if t-m.candSince >= need {
			m.cur, m.since, m.hasCand = m.cand, m.candSince, false
			rep.Changed = true
		}
	}
	rep.Condition, rep.Since = m.cur, m.since
	return rep
}
