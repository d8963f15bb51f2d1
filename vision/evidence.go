package vision

import (
	"errors"
	"fmt"
	"image"
	"image/color"
	"math"
	"os"
	"path/filepath"
	"sort"
	"strings"
	"time"

	"gocv.io/x/gocv"

	"stillwater/vision/decode"
)

// EvidenceConfig sets up the recent-frame buffer and clip recording.
type EvidenceConfig struct {
	// PreRoll is how much recent video is kept and starts each clip, media
	// time; zero selects 5 s.
	PreRoll time.Duration
	// PostRoll is how long a clip goes on after StartClip, media time; zero
	// selects 10 s.
	PostRoll time.Duration
	// Quality is the JPEG quality of buffered frames and snapshots, 1–100;
	// zero selects 80.
	Quality int
	// FPS is the frame rate written into clips; zero takes the source's
	// nominal rate, or 10 when it has none.
	FPS float64
	// SnapshotsOnly keeps no frames and records no clips: the clips come
	// from elsewhere (a camera's main stream copied without decoding, see
	// vision/remux); snapshots are written as usual.
	SnapshotsOnly bool
	// OnWritten, if set, is called on the evidence writer's goroutine
	// after each snapshot is written and each clip is finished, or failed.
	// It may take its time (prune old files, log): it holds up only the
	// writer, never the frames.
	OnWritten func(EvidenceWritten)
}

// Annotation is what Snapshot draws over the latest frame. Coordinates are
// source pixels, origin top-left, y down. Text is drawn with OpenCV's
// Hershey font, which has ASCII glyphs only: other characters are replaced
// (· by -, ² by 2, others by ?).
type Annotation struct {
	Outline []Point // pool outline polygon, closed
	Boxes   []LabeledBox
	Caption string // one line across the top
}

// LabeledBox is a box with a label above it.
type LabeledBox struct {
	Box   image.Rectangle
	Label string
}

// Colours of the annotation: the pool outline amber, boxes and their
// labels red, the caption white on a dark band.
var (
	outlineColor = color.RGBA{R: 255, G: 210, B: 0}
	boxColor     = color.RGBA{R: 255, G: 40, B: 40}
	captionColor = color.RGBA{R: 255, G: 255, B: 255}
)

// jpegFrame is one buffered frame. data is never changed once made, so
// the ring and the writer share it.
type jpegFrame struct {
	media time.Duration
	data  []byte
}

// evidence holds the pre-roll ring and the state of the clip being
// recorded, on the camera's side; its writer does the file work.
type evidence struct {
	cfg  EvidenceConfig
	fps  float64
	ring []jpegFrame
	size image.Point
	// pk, when not nil, is the pre-roll of a stream whose packets are
	// kept (see streamCapture.packets): ring stays empty and clips are
	// MP4 copies of the packets.
	pk *packetRing
	// gap: a packet of the clip being recorded was left out (the writer
	// was behind); the clip resumes at the next key frame.
	gap bool
	// The clip being recorded: path is "" when none. The writer follows
	// the same rule (a clip ends with the first frame at or past until).
	path  string
	until time.Duration
	w     *evidenceWriter
}

// ringCap is the most frames the pre-roll needs: PreRoll of frames at
// the clip rate, and the newest one.
func (e *evidence) ringCap() int {
	return int(math.Ceil(e.cfg.PreRoll.Seconds()*e.fps)) + 1
}

// EnableEvidence starts buffering recent frames (JPEG in memory) from the
// next call to Next, so that StartClip can include a pre-roll, and starts
// the camera's evidence writer: a goroutine that writes clips and
// snapshots off the frame path (Close stops it). Calling it again changes
// the settings for later clips.
func (c *Camera) EnableEvidence(cfg EvidenceConfig) error {
	if cfg.PreRoll < 0 || cfg.PostRoll < 0 {
		return fmt.Errorf("evidence: pre-roll %v and post-roll %v must not be negative", cfg.PreRoll, cfg.PostRoll)
	}
	if cfg.Quality < 0 || cfg.Quality > 100 {
		return fmt.Errorf("evidence: jpeg quality %d: want 1–100", cfg.Quality)
	}
	if cfg.PreRoll == 0 {
		cfg.PreRoll = 5 * time.Second
	}
	if cfg.PostRoll == 0 {
		cfg.PostRoll = 10 * time.Second
	}
	if cfg.Quality == 0 {
		cfg.Quality = 80
	}
	fps := cfg.FPS
	if fps <= 0 {
		fps = c.fps
	}
	if fps <= 0 {
		fps = 10
	}
	if c.ev != nil {
		c.ev.cfg, c.ev.fps = cfg, fps
		c.ev.w.setNotify(cfg.OnWritten)
	} else {
		c.ev = &evidence{cfg: cfg, fps: fps, w: startEvidenceWriter(cfg.OnWritten)}
	}
	if sc, ok := c.cap.(*streamCapture); ok {
		sc.keep = c.keepsPackets()
	}
	return nil
}

// keepsPackets reports whether the camera's clips may want its stream's
// packets: it keeps evidence, and its clips are not another stream's.
func (c *Camera) keepsPackets() bool { return c.ev != nil && !c.ev.cfg.SnapshotsOnly }

// add buffers the frame (of size; bgr gives it whole, and is called only
// when a JPEG of it is made) and, while a clip is recorded, hands it to
// the writer. It never waits for the writer. When the stream's packets
// are kept (copyable, see streamCapture.packets) it buffers pkts, the
// packets read since the frame before, instead of a JPEG of the frame.
func (e *evidence) add(size image.Point, bgr func() (gocv.Mat, error), media time.Duration, pkts []decode.Packet, params decode.Params, copyable bool) error {
	if e.cfg.SnapshotsOnly {
		return nil
	}
	if copyable {
		e.addPackets(size, media, pkts, params)
		return nil
	}
	if e.pk != nil { // the stream changed to a codec whose packets are not kept
		e.restart(nil)
	}
	frame, err := bgr()
	if err != nil {
		return fmt.Errorf("evidence: %w", err)
	}
	data, err := encodeJPEG(frame, e.cfg.Quality)
	if err != nil {
		return fmt.Errorf("evidence: %w", err)
	}
	e.size = image.Pt(frame.Cols(), frame.Rows())
	f := jpegFrame{media: media, data: data}
	e.ring = append(e.ring, f)
	cut := 0
	for cut < len(e.ring) && e.ring[cut].media <= media-e.cfg.PreRoll {
		cut++
	}
	// A source whose timestamps barely move (repeated stamps are stepped
	// by 1 ms) would otherwise fill the ring without bound.
	cut = max(cut, len(e.ring)-e.ringCap())
	if cut > 0 {
		n := copy(e.ring, e.ring[cut:])
		clear(e.ring[n:])
		e.ring = e.ring[:n]
	}
	if e.path == "" {
		return nil
	}
	e.w.frame(f)
	if media >= e.until {
		e.path = ""
	}
	return nil
}

// addPackets is add for a stream whose packets are kept.
func (e *evidence) addPackets(size image.Point, media time.Duration, pkts []decode.Packet, params decode.Params) {
	if e.pk == nil || !e.pk.params.Equal(params) {
		// First packets, or a reopened stream set up otherwise: its
		// packets cannot follow the old ones in one file.
		e.restart(&packetRing{params: params})
	}
	e.size = size
	kept := e.pk.add(pkts, media, e.cfg.PreRoll, e.fps)
	if e.path == "" || len(kept) == 0 {
		return
	}
	if e.gap {
		// Packets after one left out would decode wrong until the next
		// key frame: leave them out too.
		k := 0
		for k < len(kept) && !kept[k].Key {
			k++
		}
		e.w.skipped(k)
		kept = kept[k:]
		e.gap = len(kept) == 0
	}
	if len(kept) > 0 && !e.w.packets(packetBatch{media: media, pkts: kept}) {
		e.gap = true
	}
	if media >= e.until {
		e.path = ""
	}
}

// restart ends the clip being recorded and empties the pre-roll, which
// from now on is pk (nil: JPEG pictures).
func (e *evidence) restart(pk *packetRing) {
	clear(e.ring)
	e.ring = e.ring[:0]
	e.pk = pk
	if e.path != "" {
		e.path = ""
		e.w.finish()
	}
}

// resize ends the clip and drops the buffer after a frame size change.
func (e *evidence) resize() error {
	var pk *packetRing
	if e.pk != nil {
		pk = &packetRing{params: e.pk.params}
	}
	e.restart(pk)
	return nil
}

// Close finishes the clip being written and stops the writer, after it
// has written everything queued. It returns the writer's first error
// since the camera opened, if no OnWritten callback took it.
func (e *evidence) Close() error { return e.w.stop() }

// ClipInfo describes the clip StartClip asked for.
type ClipInfo struct {
	Path     string        // the file being written
	Extended bool          // true when a clip was already open and now runs longer
	Until    time.Duration // media time of the clip's last frame
	PreRoll  int           // frames (packets, for an MP4 clip) handed over from the buffer
}

// StartClip starts a clip at path (a Motion-JPEG .avi) with the buffered
// pre-roll, and keeps adding every frame Next reads until PostRoll of
// media time after the latest frame. For a stream whose packets are kept
// (H.264, H.265 and MPEG-4 files and network streams) the clip is instead
// an MP4 of the stream's own packets, from the latest key frame at least
// PreRoll old, and path's extension becomes .mp4 (ClipInfo.Path says
// so). It returns at once: the camera's
// evidence writer creates and writes the file, and reports the finished
// clip, or its failure, to EvidenceConfig.OnWritten. If a clip is already
// being recorded it is extended instead and path is ignored. Close
// finishes an open clip.
func (c *Camera) StartClip(path string) (ClipInfo, error) {
	if c.closed {
		return ClipInfo{}, errCaptureClosed
	}
	e := c.ev
	if e == nil {
		return ClipInfo{}, errors.New("start clip: evidence is not enabled (call EnableEvidence)")
	}
	if e.cfg.SnapshotsOnly {
		return ClipInfo{}, fmt.Errorf("start clip %s: this camera's clips come from its evidence stream", path)
	}
	until := c.media + e.cfg.PostRoll
	if e.path != "" {
		e.until = until
		e.w.extend(until)
		return ClipInfo{Path: e.path, Extended: true, Until: until}, nil
	}
	if e.pk != nil {
		path = strings.TrimSuffix(path, filepath.Ext(path)) + ".mp4"
		if len(e.pk.ring) == 0 {
			return ClipInfo{}, fmt.Errorf("start clip %s: no key frame read yet", path)
		}
		pre := make([]decode.Packet, len(e.pk.ring))
		for i, k := range e.pk.ring {
			pre[i] = k.p
		}
		params := e.pk.params
		if err := e.w.start(clipJob{path: path, until: until, params: &params, prePackets: pre}); err != nil {
			return ClipInfo{}, fmt.Errorf("start clip %s: %w", path, err)
		}
		e.path, e.until, e.gap = path, until, false
		return ClipInfo{Path: path, Until: until, PreRoll: len(pre)}, nil
	}
	if len(e.ring) == 0 {
		return ClipInfo{}, fmt.Errorf("start clip %s: no frame read yet", path)
	}
	pre := append([]jpegFrame(nil), e.ring...)
	if err := e.w.start(clipJob{path: path, until: until, fps: e.fps, size: e.size, pre: pre}); err != nil {
		return ClipInfo{}, fmt.Errorf("start clip %s: %w", path, err)
	}
	e.path, e.until = path, until
	return ClipInfo{Path: path, Until: until, PreRoll: len(pre)}, nil
}

// Recording returns the path of the clip being recorded, or "". The
// writer may still be writing a clip after it is no longer recorded.
func (c *Camera) Recording() string {
	if c.ev == nil {
		return ""
	}
	return c.ev.path
}

// SaveSnapshot has the evidence writer write the latest frame, with the
// annotation drawn over it, as a JPEG at path. It returns at once; the
// writer reports the file, or its failure, to EvidenceConfig.OnWritten.
func (c *Camera) SaveSnapshot(path string, a Annotation) error {
	if c.closed {
		return errCaptureClosed
	}
	if c.ev == nil {
		return errors.New("save snapshot: evidence is not enabled (call EnableEvidence)")
	}
	frame, err := c.bgr()
	if err != nil {
		return fmt.Errorf("save snapshot: %w", err)
	}
	if frame.Empty() {
		return errors.New("save snapshot: no frame read yet")
	}
	img := frame.Clone()
	annotate(&img, a)
	if err := c.ev.w.snapshot(snapJob{path: path, img: img, quality: c.ev.cfg.Quality}); err != nil {
		img.Close()
		return fmt.Errorf("save snapshot %s: %w", path, err)
	}
	return nil
}

// Snapshot returns the latest frame as a JPEG with the annotation drawn over it. It
// needs no EnableEvidence.
func (c *Camera) Snapshot(a Annotation) ([]byte, error) {
	if c.closed {
		return nil, errCaptureClosed
	}
	frame, err := c.bgr()
	if err != nil {
		return nil, fmt.Errorf("snapshot: %w", err)
	}
	if frame.Empty() {
		return nil, errors.New("snapshot: no frame read yet")
	}
	img := frame.Clone()
	defer img.Close()
	annotate(&img, a)
	q := 80
	if c.ev != nil {
		q = c.ev.cfg.Quality
	}
	b, err := encodeJPEG(img, q)
	if err != nil {
		return nil, fmt.Errorf("snapshot: %w", err)
	}
	return b, nil
}

func annotate(img *gocv.Mat, a Annotation) {
	thick := max(2, img.Cols()/320)
	if len(a.Outline) >= 2 {
		pts := make([]image.Point, len(a.Outline))
		for i, p := range a.Outline {
			pts[i] = image.Pt(int(math.Round(p.X)), int(math.Round(p.Y)))
		}
		pv := gocv.NewPointsVectorFromPoints([][]image.Point{pts})
		gocv.Polylines(img, pv, true, outlineColor, thick)
		pv.Close()
	}
	scale := math.Max(0.4, float64(img.Cols())/1280)
	for _, b := range a.Boxes {
		gocv.Rectangle(img, b.Box, boxColor, thick)
		if b.Label == "" {
			continue
		}
		txt := asciiLabel(b.Label)
		sz := gocv.GetTextSize(txt, gocv.FontHersheySimplex, scale, 1)
		org := image.Pt(b.Box.Min.X, b.Box.Min.Y-4)
		if org.Y-sz.Y < 0 {
			org.Y = b.Box.Max.Y + sz.Y + 4
		}
		gocv.Rectangle(img, image.Rect(org.X, org.Y-sz.Y-3, org.X+sz.X+4, org.Y+3), color.RGBA{}, -1)
		gocv.PutText(img, txt, image.Pt(org.X+2, org.Y), gocv.FontHersheySimplex, scale, boxColor, 1)
	}
	if a.Caption != "" {
		txt := asciiLabel(a.Caption)
		sz := gocv.GetTextSize(txt, gocv.FontHersheySimplex, scale, 1)
		gocv.Rectangle(img, image.Rect(0, 0, img.Cols(), sz.Y+10), color.RGBA{}, -1)
		gocv.PutText(img, txt, image.Pt(5, sz.Y+5), gocv.FontHersheySimplex, scale, captionColor, 1)
	}
}

// asciiLabel maps text onto the Hershey font's ASCII glyphs.
func asciiLabel(s string) string {
	var b strings.Builder
	for _, r := range s {
		switch {
		case r == '·' || r == '–' || r == '—':
			b.WriteByte('-')
		case r == '²':
			b.WriteByte('2')
		case r == '×':
			b.WriteByte('x')
		case r < 0x20 || r > 0x7e:
			b.WriteByte('?')
		default:
			b.WriteRune(r)
		}
	}
	return b.String()
}

// Retention limits an evidence directory. Zero fields do not limit.
type Retention struct {
	MaxFiles int           // keep at most this many files
	MaxBytes int64         // keep at most this many bytes in total
	MaxAge   time.Duration // remove files modified longer ago than this
	// Keep are paths never removed, such as the clip being recorded.
	Keep []string
}

// isEvidence says whether PruneEvidence manages a file of this name; it
// leaves any other file in the directory alone.
func isEvidence(name string) bool {
	switch strings.ToLower(filepath.Ext(name)) {
	case ".avi", ".mp4", ".jpg", ".jpeg":
		return true
	}
	return false
}

// PruneEvidence removes evidence files (.avi, .mp4, .jpg, .jpeg) directly in dir
// until the newest ones left fit every limit of r, deleting oldest first by
// modification time. It returns how many files it removed.
func PruneEvidence(dir string, r Retention, now time.Time) (int, error) {
	entries, err := os.ReadDir(dir)
	if err != nil {
		return 0, fmt.Errorf("prune evidence %s: %w", dir, err)
	}
	keep := map[string]bool{}
	for _, k := range r.Keep {
		keep[filepath.Clean(k)] = true
	}
	type file struct {
		path string
		size int64
		mod  time.Time
	}
	var files []file
	for _, e := range entries {
		if !e.Type().IsRegular() || !isEvidence(e.Name()) {
			continue
		}
		info, err := e.Info()
		if err != nil {
			continue // removed meanwhile
		}
		files = append(files, file{filepath.Join(dir, e.Name()), info.Size(), info.ModTime()})
	}
	sort.Slice(files, func(i, j int) bool {
		if !files[i].mod.Equal(files[j].mod) {
			return files[i].mod.After(files[j].mod)
		}
		return files[i].path > files[j].path
	})
	var (
		count   int
		total   int64
		removed int
		full    bool // a newer file did not fit: every older one goes
		errs    []error
	)
	// Files that must stay count against the limits first.
	for _, f := range files {
		if keep[filepath.Clean(f.path)] {
			count++
			total += f.size
		}
	}
	for _, f := range files {
		if keep[filepath.Clean(f.path)] {
			continue
		}
		fits := !full && (r.MaxFiles <= 0 || count+1 <= r.MaxFiles) &&
			(r.MaxBytes <= 0 || total+f.size <= r.MaxBytes) &&
			(r.MaxAge <= 0 || now.Sub(f.mod) <= r.MaxAge)
		full = !fits
		if fits {
			count++
			total += f.size
			continue
		}
		if err := os.Remove(f.path); err != nil && !errors.Is(err, os.ErrNotExist) {
			errs = append(errs, err)
			continue
		}
		removed++
	}
	if len(errs) > 0 {
		return removed, fmt.Errorf("prune evidence %s: %w", dir, errors.Join(errs...))
	}
	return removed, nil
}
