package watch

import (
	"context"
	"crypto/sha256"
	"encoding/binary"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"image"
	"image/color"
	"image/png"
	"io"
	"math"
	"os"
	"path/filepath"
	"time"

	"stillwater/cmd/stillwater/internal/config"
	"stillwater/cmd/stillwater/internal/pipeline"
	"stillwater/vision"
)

// The empty-pool reference is the rectified detector's background of the
// empty pool, kept in the data directory so that a daemon starting (or a
// camera reconnecting to a changed picture) watches from its first seconds
// instead of learning whatever is in the water as background. It is three
// files under data_dir/reference/: CAMERA-empty.png, the mean of the water
// seen from straight above (8-bit BGR, a picture to check by eye);
// CAMERA-spread.png, each cell's standard deviation ×spreadScale; and
// CAMERA-empty.json, what they were made from.

// SpreadScale is how many grey levels of the spread picture one grey level
// of standard deviation is: up to 31.9 grey levels in 1/8 steps.
const SpreadScale = 8

// ReferenceMeta describes a saved reference.
type ReferenceMeta struct {
	Camera string    `json:"camera"`
	Saved  time.Time `json:"saved"`
	Frames int       `json:"frames"`
	Cols   int       `json:"cols"`
	Rows   int       `json:"rows"`
	CellM  float64   `json:"cell_m"`
	// Grid is a hash of the rectification (the calibration seen through
	// the detector's grid): a reference made for another calibration is
	// not used.
	Grid string `json:"grid"`
	Note string `json:"note,omitempty"`
}

// ReferencePaths returns the reference's files for a camera.
func ReferencePaths(dataDir, camID string) (mean, spread, meta string) {
	base := filepath.Join(dataDir, "reference", camID)
	return base + "-empty.png", base + "-spread.png", base + "-empty.json"
}

// gridHash fingerprints a rectification: its size, cell and maps.
func gridHash(g *vision.Rectification) string {
	h := sha256.New()
	binary.Write(h, binary.LittleEndian, []float64{float64(g.Cols), float64(g.Rows), g.Cell, g.OriginX, g.OriginY})
	binary.Write(h, binary.LittleEndian, g.MapX)
	binary.Write(h, binary.LittleEndian, g.MapY)
	h.Write(g.Water)
	return hex.EncodeToString(h.Sum(nil))[:16]
}

// SaveReference writes a camera's reference, replacing the files whole.
func SaveReference(dataDir, camID string, g *vision.Rectification, ref vision.Reference, now time.Time, note string) error {
	if ref.Cols != g.Cols || ref.Rows != g.Rows || len(ref.Mean) != 3*g.Cols*g.Rows || len(ref.Var) != len(ref.Mean) {
		return fmt.Errorf("save reference: %d×%d cells for a %d×%d grid", ref.Cols, ref.Rows, g.Cols, g.Rows)
	}
	meanPath, spreadPath, metaPath := ReferencePaths(dataDir, camID)
	if err := os.MkdirAll(filepath.Dir(meanPath), 0o750); err != nil {
		return fmt.Errorf("save reference: %w", err)
	}
	mean := image.NewRGBA(image.Rect(0, 0, ref.Cols, ref.Rows))
	spread := image.NewRGBA(mean.Rect)
	level := func(v float64) uint8 { return uint8(math.Max(0, math.Min(255, math.Round(v)))) }
	for i := 0; i < ref.Cols*ref.Rows; i++ {
		x, y := i%ref.Cols, i/ref.Cols
		b, gg, r := ref.Mean[3*i], ref.Mean[3*i+1], ref.Mean[3*i+2]
		mean.SetRGBA(x, y, color.RGBA{level(float64(r)), level(float64(gg)), level(float64(b)), 255})
		sd := func(c int) uint8 { return level(SpreadScale * math.Sqrt(math.Max(0, float64(ref.Var[3*i+c])))) }
		spread.SetRGBA(x, y, color.RGBA{sd(2), sd(1), sd(0), 255})
	}
	meta := ReferenceMeta{Camera: camID, Saved: now.UTC(), Frames: ref.Frames, Cols: ref.Cols, Rows: ref.Rows, CellM: g.Cell, Grid: gridHash(g), Note: note}
	mb, err := json.MarshalIndent(meta, "", "  ")
	if err != nil {
		return fmt.Errorf("save reference: %w", err)
	}
	for _, f := range []struct {
		path  string
		write func(*os.File) error
	}{
		{meanPath, func(f *os.File) error { return png.Encode(f, mean) }},
		{spreadPath, func(f *os.File) error { return png.Encode(f, spread) }},
		{metaPath, func(f *os.File) error { _, err := f.Write(append(mb, '\n')); return err }},
	} {
		if err := writeReplacing(f.path, f.write); err != nil {
			return fmt.Errorf("save reference: %w", err)
		}
	}
	return nil
}

// writeReplacing writes a file beside path and renames it into place.
func writeReplacing(path string, write func(*os.File) error) error {
	tmp, err := os.CreateTemp(filepath.Dir(path), "."+filepath.Base(path)+".*")
	if err != nil {
		return err
	}
	defer os.Remove(tmp.Name())
	if err := write(tmp); err != nil {
		tmp.Close()
		return fmt.Errorf("%s: %w", path, err)
	}
	if err := tmp.Close(); err != nil {
		return fmt.Errorf("%s: %w", path, err)
	}
	return os.Rename(tmp.Name(), path)
}

// ErrNoReference means a camera has no saved reference.
var ErrNoReference = errors.New("no empty-pool reference saved")

// LoadReference reads a camera's reference. It fails, saying why, when
// there is none, when it is unreadable, or when it was made for another
// calibration.
func LoadReference(dataDir, camID string, g *vision.Rectification) (*vision.Reference, ReferenceMeta, error) {
	meanPath, spreadPath, metaPath := ReferencePaths(dataDir, camID)
	var meta ReferenceMeta
	b, err := os.ReadFile(metaPath)
	if errors.Is(err, os.ErrNotExist) {
		return nil, meta, ErrNoReference
	}
	if err != nil {
		return nil, meta, fmt.Errorf("load reference: %w", err)
	}
	if err := json.Unmarshal(b, &meta); err != nil {
		return nil, meta, fmt.Errorf("load reference %s: %w", metaPath, err)
	}
	if meta.Grid != gridHash(g) || meta.Cols != g.Cols || meta.Rows != g.Rows {
		return nil, meta, fmt.Errorf("load reference %s: made for another calibration or cell size (saved %s); it will be replaced", metaPath, meta.Saved.Format(time.RFC3339))
	}
	read := func(path string) (image.Image, error) {
		f, err := os.Open(path)
		if err != nil {
			return nil, err
		}
		defer f.Close()
		img, err := png.Decode(f)
		if err != nil {
			return nil, fmt.Errorf("%s: %w", path, err)
		}
		if img.Bounds().Dx() != g.Cols || img.Bounds().Dy() != g.Rows {
			return nil, fmt.Errorf("%s: %v pixels, want %d×%d", path, img.Bounds().Size(), g.Cols, g.Rows)
		}
		return img, nil
	}
	mean, err := read(meanPath)
	if err != nil {
		return nil, meta, fmt.Errorf("load reference: %w", err)
	}
	spread, err := read(spreadPath)
	if err != nil {
		return nil, meta, fmt.Errorf("load reference: %w", err)
	}
	ref := &vision.Reference{Cols: g.Cols, Rows: g.Rows, Mean: make([]float32, 3*g.Cols*g.Rows), Var: make([]float32, 3*g.Cols*g.Rows), Frames: meta.Frames}
	o := mean.Bounds().Min
	for i := 0; i < g.Cols*g.Rows; i++ {
		x, y := o.X+i%g.Cols, o.Y+i/g.Cols
		r, gg, bb, _ := mean.At(x, y).RGBA()
		ref.Mean[3*i], ref.Mean[3*i+1], ref.Mean[3*i+2] = float32(bb>>8), float32(gg>>8), float32(r>>8)
		r, gg, bb, _ = spread.At(x, y).RGBA()
		for c, v := range []uint32{bb >> 8, gg >> 8, r >> 8} {
			sd := float32(v) / SpreadScale
			ref.Var[3*i+c] = sd * sd
		}
	}
	return ref, meta, nil
}

// referenceEvery is how often, in media time, a watching camera's
// reference is refreshed while the pool is armed and quiet, and
// referenceQuiet how long nothing may have been tracked before.
const (
	referenceEvery = 10 * time.Minute
	referenceQuiet = time.Minute
)

// referenceKeeper refreshes a camera's reference from its live model while
// the pool is armed and nothing has been tracked for referenceQuiet.
type referenceKeeper struct {
	dataDir, camID string
	grid           *vision.Rectification
	next           time.Duration // media time of the next refresh
	busy           time.Duration // media time something was last tracked
	saved          time.Time
}

func newReferenceKeeper(dataDir, camID string, grid *vision.Rectification) *referenceKeeper {
	if dataDir == "" || grid == nil {
		return nil
	}
	return &referenceKeeper{dataDir: dataDir, camID: camID, grid: grid, next: referenceEvery}
}

// step refreshes the reference when one is due. It returns whether it
// saved, and any error (which the caller logs; watching goes on).
func (k *referenceKeeper) step(vc *vision.Camera, media time.Duration, tracked, armed bool, now time.Time) (bool, error) {
	if k == nil {
		return false, nil
	}
	if tracked || !armed {
		k.busy = media
		return false, nil
	}
	if media < k.next || media-k.busy < referenceQuiet {
		return false, nil
	}
	ref, ok := vc.Reference()
	if !ok {
		return false, nil
	}
	k.next = media + referenceEvery
	if err := SaveReference(k.dataDir, k.camID, k.grid, ref, now, "refreshed while armed and quiet"); err != nil {
		return false, err
	}
	k.saved = now
	return true, nil
}

// dataDir is the daemon's data directory (evidence lives in data_dir/evidence).
func (w *Camera) dataDir() string {
	if w.evidence.dir == "" {
		return ""
	}
	return filepath.Dir(w.evidence.dir)
}

// useReference starts the detector from the camera's saved empty-pool
// reference when there is one for this calibration, and sets up its
// refreshing.
func (w *Camera) useReference(dc *vision.DetectorConfig) {
	if dc.Grid == nil || w.dataDir() == "" {
		return
	}
	w.refs = newReferenceKeeper(w.dataDir(), w.Cam.ID, dc.Grid)
	ref, meta, err := LoadReference(w.dataDir(), w.Cam.ID, dc.Grid)
	switch {
	case errors.Is(err, ErrNoReference):
		w.log.Info("no empty-pool reference yet: the background is learned from the first seconds; whatever is in the water then is learned with it", "saved_by", "stillwater calibrate -data-dir, or after 10 min armed and quiet")
	case err != nil:
		w.log.Warn("empty-pool reference not used", "err", err)
	default:
		dc.Reference = ref
		w.log.Info("starting from the empty-pool reference", "saved", meta.Saved.Format(time.RFC3339), "frames", meta.Frames)
	}
}

// keepReference refreshes the reference while the pool is armed and quiet.
func (w *Camera) keepReference(vc *vision.Camera, proc *pipeline.Processor, r vision.Result, armed bool) {
	saved, err := w.refs.step(vc, r.Media, len(proc.Tracks) > 0, armed, w.now())
	switch {
	case err != nil:
		w.log.Error("empty-pool reference not refreshed", "err", err)
	case saved:
		w.log.Info("empty-pool reference refreshed")
	}
}

// LearnReference watches a clip or a camera of the empty pool for learn
// (media time) and returns the detector's background as a reference,
// with the grid it is for.
func LearnReference(ctx context.Context, cam config.CameraConfig, transport string, timeout, learn time.Duration) (vision.Reference, *vision.Rectification, error) {
	cal, err := config.NewCalibration(cam)
	if err != nil {
		return vision.Reference{}, nil, err
	}
	dc, err := pipeline.DetectorConfig(cam, cal)
	if err != nil {
		return vision.Reference{}, nil, err
	}
	if dc.Grid == nil {
		return vision.Reference{}, nil, fmt.Errorf("detect.method %s keeps no empty-pool reference", cam.Detect.Method)
	}
	dc.MeanVar.WarmUp = learn
	vc, err := vision.OpenCamera(vision.SourceConfig{URI: cam.Source, Transport: transport, OpenTimeout: timeout, ReadTimeout: timeout, Deblock: cam.Deblock}, dc)
	if err != nil {
		return vision.Reference{}, nil, err
	}
	defer vc.Close()
	for {
		if err := ctx.Err(); err != nil {
			return vision.Reference{}, nil, err
		}
		r, err := vc.Next(nil)
		if errors.Is(err, io.EOF) {
			return vision.Reference{}, nil, fmt.Errorf("%s ended after %.1f s, before %v of the empty pool were seen", vision.Redact(cam.Source), r.Media.Seconds(), learn)
		}
		if err != nil {
			return vision.Reference{}, nil, err
		}
		if ref, ok := vc.Reference(); ok {
			return ref, dc.Grid, nil
		}
	}
}
