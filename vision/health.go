package vision

import (
	"bytes"
	"fmt"
	"image"
	"math"
	"time"

	"gocv.io/x/gocv"
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
	// Diff and Identical are then meaningless.
	HasPrev bool
	// Diff is the mean absolute grey difference to the previous frame.
	Diff float64
	// Identical is true when the full-resolution frame equals the previous
	// one in every pixel and channel, as a frozen encoder repeats it.
	Identical bool
	// Correlation is the mean Pearson correlation between each pixel and its
	// right and lower neighbours, −1…1; 0 for a flat frame. Camera images
	// of real scenes are strongly correlated at this scale, independent
	// pixel noise is not.
	Correlation float64
}

// healthWidth is the width frames are scaled to for HealthStats, px.
const healthWidth = 160

// healthProbe owns the Mats HealthStats are measured with.
type healthProbe struct {
	small, gray gocv.Mat
	ready       bool
	prev        []byte // previous frame at probe size, grey
	prevFull    []byte // previous frame at full size, as decoded
	prevShape   [3]int // cols, rows, type of prevFull
	hasPrev     bool
}

func (p *healthProbe) init() {
	p.small, p.gray = gocv.NewMat(), gocv.NewMat()
	p.ready = true
}

// reset forgets the previous frame, so that a reconnect is not mistaken for
// a change or a freeze.
func (p *healthProbe) reset() { p.hasPrev = false }

// measure computes the statistics of frame (BGR or grey) and remembers it as
// the previous frame.
func (p *healthProbe) measure(frame gocv.Mat) HealthStats {
	if !p.ready {
		p.init()
	}
	src := image.Pt(frame.Cols(), frame.Rows())
	size := src
	if src.X > healthWidth {
		size = image.Pt(healthWidth, max(1, int(math.Round(float64(src.Y)*healthWidth/float64(src.X)))))
		gocv.Resize(frame, &p.small, size, 0, 0, gocv.InterpolationArea)
	} else {
		frame.CopyTo(&p.small)
	}
	if p.small.Channels() == 3 {
		gocv.CvtColor(p.small, &p.gray, gocv.ColorBGRToGray)
	} else {
		p.small.CopyTo(&p.gray)
	}
	cur := p.gray.ToBytes()
	full := fullBytes(frame)
	shape := [3]int{frame.Cols(), frame.Rows(), int(frame.Type())}
	var st HealthStats
	if p.hasPrev && len(p.prev) == len(cur) && shape == p.prevShape {
		st.HasPrev = true
		st.Identical = bytes.Equal(full, p.prevFull)
	}
	var prev []byte
	if st.HasPrev {
		prev = p.prev
	}
	st.Mean, st.Spread, st.Diff, st.Correlation = greyStats(cur, prev, size.X, size.Y)
	p.prevFull = append(p.prevFull[:0], full...)
	p.prevShape = shape
	p.prev = cur
	p.hasPrev = true
	return st
}

// fullBytes returns the pixels of m, without a copy when m is continuous.
// The slice is only valid until m changes.
func fullBytes(m gocv.Mat) []byte {
	if m.IsContinuous() {
		if b, err := m.DataPtrUint8(); err == nil {
			return b
		}
	}
	return m.ToBytes()
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
	CondFrozen  Condition = "frozen"  // the same image over and over
	CondNoise   Condition = "noise"   // uncorrelated pixels: no signal, a broken sensor
)

// HealthConfig sets the thresholds and hold times of a HealthMonitor. Zero
// fields take the defaults of DefaultHealth.
type HealthConfig struct {
	// DarkLevel: a mean grey level below this is dark.
	DarkLevel float64
	// UniformSpread: a standard deviation below this is uniform.
	UniformSpread float64
	// FrozenDiff: a mean absolute difference to the previous frame at or
	// below this counts as a repeat. Zero (the default) counts only frames
	// identical in every pixel.
	FrozenDiff float64
	// NoiseCorrelation: a neighbour correlation below this is noise.
	NoiseCorrelation float64
	// Hold is how long a fault must persist before it is reported, media
	// time.
	Hold time.Duration
	// FrozenHold is how long repeated frames must go on before the picture
	// is reported frozen; zero takes Hold.
	FrozenHold time.Duration
	// Recover is how long the picture must be fine again before the fault
	// is cleared, media time.
	Recover time.Duration
}

// DefaultHealth returns the default thresholds. The levels are set with
// margin against the synthetic day, night and cloud scenes and the opencv-doc
// reference footage (see health_test.go); the 2 s holds report a fault well
// within 5 s of its onset.
func DefaultHealth() HealthConfig {
	return HealthConfig{
		DarkLevel:        8,
		UniformSpread:    2.5,
		NoiseCorrelation: 0.35,
		Hold:             2 * time.Second,
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
		c.FrozenHold = c.Hold
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
	case c.FrozenDiff < 0 || c.FrozenDiff > 255:
		return fmt.Errorf("health frozen diff %g: want 0–255", c.FrozenDiff)
	case c.NoiseCorrelation < 0 || c.NoiseCorrelation > 1:
		return fmt.Errorf("health noise correlation %g: want 0–1", c.NoiseCorrelation)
	case c.Hold < 0 || c.Recover < 0 || c.FrozenHold < 0:
		return fmt.Errorf("health hold %v / frozen hold %v / recover %v: want non-negative", c.Hold, c.FrozenHold, c.Recover)
	}
	return nil
}

// Classify returns the condition one frame's statistics suggest, before
// any hold. Darkness wins over uniformity, which wins over a freeze (a
// frozen black picture is reported as dark), which wins over noise.
func (c HealthConfig) Classify(s HealthStats) Condition {
	c = c.withDefaults()
	switch {
	case s.Mean < c.DarkLevel:
		return CondDark
	case s.Spread < c.UniformSpread:
		return CondUniform
	case s.HasPrev && (s.Identical || (c.FrozenDiff > 0 && s.Diff <= c.FrozenDiff)):
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
	// Frame is the condition of this frame alone.
	Frame Condition
}

// HealthMonitor turns per-frame statistics into a stable condition: a fault
// is reported once it has persisted for Hold and cleared once the picture
// has been fine for Recover. Pure Go; not safe for concurrent use.
type HealthMonitor struct {
	cfg       HealthConfig
	cur       Condition
	since     time.Duration
	cand      Condition
	candSince time.Duration
	hasCand   bool
}

// NewHealthMonitor returns a monitor that starts in CondOK.
func NewHealthMonitor(cfg HealthConfig) *HealthMonitor {
	return &HealthMonitor{cfg: cfg.withDefaults(), cur: CondOK}
}

// Condition returns the reported condition.
func (m *HealthMonitor) Condition() Condition { return m.cur }

// Observe feeds one frame's statistics at media time t (non-decreasing).
func (m *HealthMonitor) Observe(t time.Duration, s HealthStats) HealthReport {
	f := m.cfg.Classify(s)
	rep := HealthReport{Frame: f}
	switch {
	case f == m.cur:
		m.hasCand = false
	case !m.hasCand:
		m.cand, m.candSince, m.hasCand = f, t, true
	case f != m.cand && (m.cur != CondOK || f == CondOK || m.cand == CondOK):
		// A different candidate starts its own hold, except that from OK
		// one fault turning into another (dark fading into uniform) keeps
		// the fault's onset.
		m.cand, m.candSince = f, t
	default:
		m.cand = f
	}
	if m.hasCand {
		need := m.cfg.Hold
		switch m.cand {
		case CondOK:
			need = m.cfg.Recover
		case CondFrozen:
			need = m.cfg.FrozenHold
		}
		if t-m.candSince >= need {
			m.cur, m.since, m.hasCand = m.cand, m.candSince, false
			rep.Changed = true
		}
	}
	rep.Condition, rep.Since = m.cur, m.since
	return rep
}
