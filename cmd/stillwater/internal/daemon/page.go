package daemon

import (
	"bytes"
	"context"
	"crypto/sha256"
	"crypto/subtle"
	"fmt"
	"image"
	"image/jpeg"
	"io/fs"
	"log/slog"
	"math"
	"net"
	"net/http"
	"os"
	"path/filepath"
	"regexp"
	"strconv"
	"strings"
	"sync"
	"time"

	"gopkg.in/yaml.v3"

	"stillwater/alert/arming"
	"stillwater/cmd/stillwater/internal/calibrate"
	"stillwater/cmd/stillwater/internal/cfgfile"
	"stillwater/cmd/stillwater/internal/config"
	"stillwater/cmd/stillwater/internal/console"
	"stillwater/cmd/stillwater/internal/pipeline"
	"stillwater/cmd/stillwater/internal/watch"
	"stillwater/homography"
)

// pageEvents is how many alarms and faults the page's recorder keeps.
const pageEvents = 100

// pageBackend is the daemon's side of the homeowner's page (package console):
// the cameras, arming, the recent events and the calibration, read from
// the running daemon, and a calibration save written to the
// configuration file and reloaded as SIGHUP reloads it.
type pageBackend struct {
	watches  []*watch.Camera // set by Serve once built, before HTTP starts
	arming   *arming.Arming
	rec      *console.Recorder
	evidence fs.FS // nil when evidence is off
	dataDir  string
	now      func() time.Time
	log      *slog.Logger

	configFile string
	load       func() (config.Config, error)
	reread     func()

	saveMu sync.Mutex // one save at a time
	rateMu sync.Mutex
	rates  map[string]frameRate

	ctl *controlGate
}

// frameRate is a camera's frames per second between two looks.
type frameRate struct {
	at     time.Time
	frames int64
	fps    float64
}

// fpsWindow is the least time between two looks at a camera's frame count.
const fpsWindow = 2 * time.Second

func newPage(cfg config.Config, d Deps, arm *arming.Arming, now func() time.Time, log *slog.Logger) *pageBackend {
	p := &pageBackend{
		arming: arm, rec: console.NewRecorder(pageEvents), dataDir: cfg.DataDir, now: now, log: log,
		configFile: d.ConfigFile, load: d.LoadConfig, reread: d.Reread, rates: map[string]frameRate{},
		ctl: &controlGate{throttle: arming.NewThrottle(0, 0, nil)},
	}
	if cfg.Evidence.On() {
		p.evidence = os.DirFS(filepath.Join(cfg.DataDir, "evidence"))
	}
	return p
}

// handler is the page and its API, the API behind the picture gate and
// a save behind the control token.
func (p *pageBackend) handler(pictures *pictureGate, onRefused func()) http.Handler {
	return console.Handler(p, console.Options{
		Log: p.log, Now: p.now, Guard: pictures.wrap, Notice: safetyNotice,
		Authorize: func(r *http.Request) error { return p.ctl.authorize(r, onRefused) },
	})
}

// sink records every message the cameras send on its way to next.
func (p *pageBackend) sink(next pipeline.Sink) pipeline.Sink {
	return recordingSink{next: next, rec: p.rec, log: p.log}
}

// recordingSink feeds the page's recorder; what it cannot decode is
// logged and passed on all the same.
type recordingSink struct {
	next pipeline.Sink
	rec  *console.Recorder
	log  *slog.Logger
}

// Send records m and passes it on.
func (s recordingSink) Send(ctx context.Context, m pipeline.Message) error {
	if err := s.rec.Message(m.Kind, m.Data); err != nil {
		s.log.Warn("page: message not listed", "camera", m.Camera, "err", err)
	}
	return s.next.Send(ctx, m)
}

// live is the camera of id when it delivers frames: a camera the watchdog
// counts as lost is not asked for a view, which would wait out its frame
// timeout on every look of the page.
func (p *pageBackend) live(id string) (*watch.Camera, error) {
	w, err := p.camera(id)
	if err != nil {
		return nil, err
	}
	if _, _, lost := w.Health(p.now()); lost {
		return nil, fmt.Errorf("camera %s: %w", id, watch.ErrNoFrame)
	}
	return w, nil
}

func (p *pageBackend) camera(id string) (*watch.Camera, error) {
	for _, w := range p.watches {
		if w.Cam.ID == id {
			return w, nil
		}
	}
	return nil, fmt.Errorf("camera %q: %w", id, console.ErrNoCamera)
}

// Cameras implements console.Backend.
func (p *pageBackend) Cameras(ctx context.Context) []console.CameraStatus {
	now := p.now()
	st := p.arming.Status(now)
	armed := map[string]arming.CameraStatus{}
	for _, r := range st.Cameras {
		armed[r.Camera] = r
	}
	out := make([]console.CameraStatus, 0, len(p.watches))
	for _, w := range p.watches {
		id := w.Cam.ID
		frames, age, lost := w.Health(now)
		c := console.CameraStatus{ID: id, Faults: p.rec.Faults(id), FPS: p.fps(id, now, frames), FrameAge: round1(age.Seconds()), Frame: w.Cam.Frame}
		switch {
		case lost:
			c.Health = console.HealthLost
		case frames == 0:
			c.Health, c.FrameAge = console.HealthStarting, -1
		case len(c.Faults) > 0:
			c.Health = console.HealthFaulty
		default:
			c.Health = console.HealthWatching
		}
		if a, ok := armed[id]; ok {
			c.Armed, c.ArmedWhy, c.NextChange, c.Override = a.Armed, a.Reason, a.NextChange, a.Override != nil
		}
		out = append(out, c)
	}
	return out
}

func round1(v float64) float64 { return math.Round(v*10) / 10 }

// fps is frames per second over the latest fpsWindow or more.
func (p *pageBackend) fps(id string, now time.Time, frames int64) float64 {
	p.rateMu.Lock()
	defer p.rateMu.Unlock()
	r, ok := p.rates[id]
	switch {
	case !ok:
		p.rates[id] = frameRate{at: now, frames: frames}
	case now.Sub(r.at) >= fpsWindow:
		r.fps = math.Round(10*float64(frames-r.frames)/now.Sub(r.at).Seconds()) / 10
		r.at, r.frames = now, frames
		p.rates[id] = r
	}
	return r.fps
}

// Overlay implements console.Backend.
func (p *pageBackend) Overlay(ctx context.Context, id string) (console.Overlay, error) {
	w, err := p.live(id)
	if err != nil {
		return console.Overlay{}, err
	}
	v, err := w.View(ctx, false)
	if err != nil {
		return console.Overlay{}, err
	}
	o := console.Overlay{Frame: [2]int{v.Size.X, v.Size.Y}, Zones: v.Zones, Tracks: v.Tracks, Ignored: v.Ignored}
	for _, q := range v.Outline {
		o.Outline = append(o.Outline, [2]float64{q.X, q.Y})
	}
	return o, nil
}

// Frame implements console.Backend.
func (p *pageBackend) Frame(ctx context.Context, id string) (console.Frame, error) {
	w, err := p.live(id)
	if err != nil {
		return console.Frame{}, err
	}
	v, err := w.View(ctx, true)
	if err != nil {
		return console.Frame{}, err
	}
	return console.Frame{JPEG: v.JPEG, Seq: uint64(v.Frames), Taken: v.Taken}, nil
}

// Events implements console.Backend.
func (p *pageBackend) Events(ctx context.Context, n int) []console.Event {
	ev := p.rec.Events(n)
	for i, e := range ev {
		if e.Kind != console.EventAlarm || e.Snapshot == "" {
			continue
		}
		if w, err := p.camera(e.Camera); err == nil {
			ev[i].Why = w.Why(e.Snapshot)
		}
	}
	return console.WithEvidence(ev, p.evidence)
}

// Evidence implements console.Backend.
func (p *pageBackend) Evidence() fs.FS { return p.evidence }

// Calibration implements console.Backend.
func (p *pageBackend) Calibration(ctx context.Context, id string) (console.CalibrationInput, error) {
	w, err := p.camera(id)
	if err != nil {
		return console.CalibrationInput{}, err
	}
	cc := w.Cam.CalibrationConfig
	if v, err := w.View(ctx, false); err == nil {
		cc = v.Config.CalibrationConfig // the latest reload's
	}
	in := console.CalibrationInput{Corners: cc.Corners, Outline: cc.Outline, Length: cc.Pool.Length, Width: cc.Pool.Width, Depth: cc.Water.Depth}
	if cc.Freeform() {
		in.Corners = nil // the page places corners; reference points stay a file's
	}
	return in, nil
}

// solved is a calibration the page asked for, solved on the camera's
// latest frame.
type solved struct {
	cfg   config.CalibrationConfig
	cal   *homography.Calibration
	frame image.Image
	view  watch.View
}

// solve merges in into the camera's running calibration (lens, camera
// position, coping and drift settings stay), validates it and solves it
// as stillwater calibrate does, on the camera's latest frame.
func (p *pageBackend) solve(ctx context.Context, id string, in console.CalibrationInput) (solved, error) {
	w, err := p.camera(id)
	if err != nil {
		return solved{}, err
	}
	v, err := w.View(ctx, true)
	if err != nil {
		return solved{}, fmt.Errorf("no frame to calibrate on: %w", err)
	}
	img, err := jpeg.Decode(bytes.NewReader(v.JPEG))
	if err != nil {
		return solved{}, fmt.Errorf("camera %s: decode frame: %w", id, err)
	}
	cc := mergeCalibration(v.Config.CalibrationConfig, in, v.Size)
	if err := config.ValidateCalibration("calibration", cc); err != nil {
		return solved{}, calibrationError(err)
	}
	cal, err := config.BuildCalibration(cc)
	if err != nil {
		return solved{}, calibrationError(err)
	}
	return solved{cfg: cc, cal: cal, frame: img, view: v}, nil
}

// mergeCalibration is cur with what the page edits replaced: pool size,
// corners (a freeform pool's reference points give way to them), the
// water's edge, the frame size and a flat depth. A depth of 0 keeps a
// sloping floor set in the file and clears a flat one.
func mergeCalibration(cur config.CalibrationConfig, in console.CalibrationInput, size image.Point) config.CalibrationConfig {
	cc := cur
	cc.Pool = config.PoolConfig{Length: in.Length, Width: in.Width}
	cc.Corners = in.Corners
	cc.Reference = nil
	cc.Outline = in.Outline
	cc.Frame = [2]int{size.X, size.Y}
	switch {
	case in.Depth > 0:
		cc.Water = config.WaterConfig{Depth: in.Depth}
	case cur.Water.Shallow > 0 || cur.Water.Deep > 0:
	default:
		cc.Water = config.WaterConfig{}
	}
	return cc
}

// rectifiedWidth is about how wide, in pixels, the page's top-down view is.
const rectifiedWidth = 480

// PreviewCalibration implements console.Backend.
func (p *pageBackend) PreviewCalibration(ctx context.Context, id string, in console.CalibrationInput) (console.Preview, error) {
	s, err := p.solve(ctx, id, in)
	if err != nil {
		return console.Preview{}, err
	}
	pv := console.PreviewOf(s.cal, [2]int{s.view.Size.X, s.view.Size.Y})
	for i, c := range s.cal.Corners() {
		if c.X != in.Corners[i][0] || c.Y != in.Corners[i][1] {
			pv.Notes = append(pv.Notes, "Corners C and D were placed in crossed order; they are used swapped back.")
			break
		}
	}
	L, _ := s.cal.Size()
	ppm := math.Max(10, math.Min(100, math.Floor(rectifiedWidth/(L+2*calibrate.RectMargin))))
	img, err := calibrate.Rectify(s.frame, s.cal, ppm)
	if err != nil {
		pv.Notes = append(pv.Notes, "No top-down view: "+err.Error())
		return pv, nil
	}
	var b bytes.Buffer
	if err := jpeg.Encode(&b, img, &jpeg.Options{Quality: 80}); err != nil {
		return console.Preview{}, fmt.Errorf("encode top-down view: %w", err)
	}
	pv.Rectified, pv.PPM = b.Bytes(), ppm
	return pv, nil
}

// calibrationKeys are the camera keys stillwater calibrate writes: the
// save replaces all of them.
func calibrationKeys() []string {
	return []string{"pool", "corners", "corners_on", "coping_m", "reference_points", "outline", "frame_px", "lens", "camera_position", "water", "reference_frame", "drift"}
}

// SaveCalibration implements console.Backend: the calibration is solved
// as for a preview, the camera's latest frame kept as its camera-moved
// reference, the keys written into the configuration file as stillwater
// calibrate prints them, the whole file loaded and validated as a reload
// does, and then reloaded. A file that does not load is put back as it
// was, and the error names what is wrong.
func (p *pageBackend) SaveCalibration(ctx context.Context, id string, in console.CalibrationInput) error {
	if p.configFile == "" || p.load == nil || p.reread == nil {
		return &console.Refusal{Status: http.StatusConflict, Why: "the daemon was not started from a configuration file it can rewrite; save the calibration with stillwater calibrate"}
	}
	p.saveMu.Lock()
	defer p.saveMu.Unlock()
	s, err := p.solve(ctx, id, in)
	if err != nil {
		return err
	}
	cc := s.cfg
	cc.Corners = nil
	for _, c := range s.cal.Corners() { // C and D as used
		cc.Corners = append(cc.Corners, [2]float64{c.X, c.Y})
	}
	if cc.ReferenceFrame == "" {
		cc.ReferenceFrame = filepath.Join(p.dataDir, id+"-reference.png")
	}
	if err := calibrate.WritePNG(cc.ReferenceFrame, s.frame); err != nil {
		return fmt.Errorf("camera %s: reference frame: %w", id, err)
	}
	y, err := calibrate.YAML(cc)
	if err != nil {
		return err
	}
	var keys yaml.Node
	if err := yaml.Unmarshal(y, &keys); err != nil || len(keys.Content) != 1 {
		return fmt.Errorf("camera %s: calibration keys: %v", id, err)
	}
	src, err := os.ReadFile(p.configFile)
	if err != nil {
		return fmt.Errorf("read %s: %w", p.configFile, err)
	}
	out, err := cfgfile.SetCameraKeys(src, id, calibrationKeys(), keys.Content[0])
	if err != nil {
		return fmt.Errorf("%s: %w", p.configFile, err)
	}
	prev, err := cfgfile.Replace(p.configFile, out, p.now())
	if err != nil {
		return err
	}
	if _, err := p.load(); err != nil {
		if _, rerr := cfgfile.Replace(p.configFile, src, p.now()); rerr != nil {
			p.log.Error("page: configuration not put back; the previous one is kept beside it", "file", p.configFile, "previous", prev, "err", rerr)
		}
		return calibrationError(err)
	}
	p.log.Info("calibration saved from the page; reloading", "camera", id, "file", p.configFile, "previous", prev)
	p.reread()
	return nil
}

// Patterns that tie a validation error to what the page shows.
var (
	reCornerIndex  = regexp.MustCompile(`corners\[(\d)\]`)
	reCornerLetter = regexp.MustCompile(`corner ([A-D])\b`)
	reOutline      = regexp.MustCompile(`outline\[(\d+)\]`)
)

// calibrationError words a refused calibration for the page, naming the
// point or field it concerns where the message does.
func calibrationError(err error) error {
	msg := err.Error()
	e := &console.CalibrationError{Point: -1, Msg: msg}
	switch {
	case reCornerIndex.MatchString(msg):
		n, _ := strconv.Atoi(reCornerIndex.FindStringSubmatch(msg)[1])
		e.Field, e.Point = "corners", n
	case reCornerLetter.MatchString(msg):
		e.Field, e.Point = "corners", int(reCornerLetter.FindStringSubmatch(msg)[1][0]-'A')
	case reOutline.MatchString(msg):
		n, _ := strconv.Atoi(reOutline.FindStringSubmatch(msg)[1])
		e.Field, e.Point = "outline", n
	case strings.Contains(msg, "outline"):
		e.Field = "outline"
	case strings.Contains(msg, ".pool") || strings.Contains(msg, "length_m"):
		e.Field = "length_m"
	case strings.Contains(msg, "water") || strings.Contains(msg, "depth"):
		e.Field = "depth_m"
	case strings.Contains(msg, "corners"):
		e.Field = "corners"
	}
	return e
}

// controlGate checks the control token for a calibration save, as the
// control API checks it for arm and disarm, and slows a client whose
// tokens keep being refused.
type controlGate struct {
	throttle *arming.Throttle
	mu       sync.RWMutex
	secret   [32]byte
	enabled  bool
}

func (g *controlGate) set(secret string) {
	g.mu.Lock()
	defer g.mu.Unlock()
	g.secret, g.enabled = sha256.Sum256([]byte(secret)), secret != ""
}

func (g *controlGate) authorize(r *http.Request, onRefused func()) error {
	g.mu.RLock()
	secret, enabled := g.secret, g.enabled
	g.mu.RUnlock()
	if !enabled {
		onRefused()
		return &console.Refusal{Status: http.StatusForbidden, Why: "control is not enabled: no control secret is configured"}
	}
	client := r.RemoteAddr
	if host, _, err := net.SplitHostPort(client); err == nil {
		client = host
	}
	if _, ok := g.throttle.Wait(r.Context(), client); !ok {
		onRefused()
		return &console.Refusal{Status: http.StatusTooManyRequests, Why: "too many refused attempts from this client; wait and try again"}
	}
	tok, bearer := strings.CutPrefix(r.Header.Get("Authorization"), "Bearer ")
	if !bearer {
		tok = ""
	}
	h := sha256.Sum256([]byte(tok))
	if tok == "" || subtle.ConstantTimeCompare(h[:], secret[:]) != 1 {
		g.throttle.Refused(client)
		onRefused()
		why := "wrong token"
		if tok == "" {
			why = "missing token"
		}
		return &console.Refusal{Status: http.StatusUnauthorized, Why: why}
	}
	g.throttle.Accepted(client)
	return nil
}

var _ console.Backend = (*pageBackend)(nil)
