package console

import (
	"bytes"
	"embed"
	"encoding/json"
	"errors"
	"fmt"
	"html"
	"io"
	"io/fs"
	"log/slog"
	"math"
	"net/http"
	"net/url"
	"path"
	"strconv"
	"strings"
	"time"
)

//go:embed static
var static embed.FS

// Options are the page's settings beyond the Backend.
type Options struct {
	Log *slog.Logger
	// Now is the clock for frame ages the page is told; nil is time.Now.
	Now func() time.Time
	// ControlPath is where the daemon's control API is mounted; default
	// "/control/".
	ControlPath string
	// Guard wraps the API routes that show pictures, status and evidence
	// (the page itself, its script and style are always served); nil
	// leaves them open.
	Guard func(http.Handler) http.Handler
	// Authorize decides whether a request may save a calibration; a
	// *Refusal picks the status. Nil refuses every save.
	Authorize func(r *http.Request) error
	// Notice is shown at the top of the page: what the product is not.
	Notice string
	// Events is how many recent events the page lists; default 20.
	Events int
}

// DefaultNotice is shown when Options.Notice is empty.
const DefaultNotice = "This page and its alarms add a layer of warning; they do not replace an adult watching the pool, fences, gates, covers or the alarms local codes require."

// maxCalibrationBody bounds a calibration request; a real one is under
// 4 KiB even with a long outline.
const maxCalibrationBody = 64 << 10

// Handler serves the page at "/" and its API under APIPrefix. Mount it at
// "/" on the daemon's mux; it answers 404 for paths it does not own.
func Handler(b Backend, o Options) http.Handler {
	if o.Log == nil {
		o.Log = slog.New(slog.DiscardHandler)
	}
	if o.Now == nil {
		o.Now = time.Now
	}
	if o.ControlPath == "" {
		o.ControlPath = "/control/"
	}
	if o.Guard == nil {
		o.Guard = func(h http.Handler) http.Handler { return h }
	}
	if o.Notice == "" {
		o.Notice = DefaultNotice
	}
	if o.Events <= 0 {
		o.Events = 20
	}
	s := &server{b: b, o: o}
	mux := http.NewServeMux()
	mux.HandleFunc("GET /{$}", s.page)
	mux.HandleFunc("GET "+AssetPrefix+"{file}", s.asset)
	api := func(pattern string, h http.HandlerFunc) { mux.Handle(pattern, o.Guard(h)) }
	api("GET "+APIPrefix+"state", s.state)
	api("GET "+APIPrefix+"cameras/{id}/frame.jpg", s.frame)
	api("GET "+APIPrefix+"evidence/{file...}", s.evidence)
	api("GET "+APIPrefix+"cameras/{id}/calibration", s.calibration)
	api("POST "+APIPrefix+"cameras/{id}/calibration/preview", s.preview)
	// Saving changes the configuration: it needs the control token
	// whatever the guard lets through.
	api("PUT "+APIPrefix+"cameras/{id}/calibration", s.save)
	return mux
}

type server struct {
	b Backend
	o Options
}

func (s *server) page(w http.ResponseWriter, r *http.Request) {
	b, err := static.ReadFile("static/index.html")
	if err != nil {
		http.Error(w, "page missing from the build", http.StatusInternalServerError)
		return
	}
	b = bytes.Replace(b, []byte("{{control}}"), []byte(html.EscapeString(s.o.ControlPath)), 1)
	b = bytes.Replace(b, []byte("{{api}}"), []byte(APIPrefix), 1)
	b = bytes.Replace(b, []byte("{{notice}}"), []byte(html.EscapeString(s.o.Notice)), 1)
	setPageHeaders(w)
	w.Header().Set("Content-Type", "text/html; charset=utf-8")
	w.Write(b)
}

// setPageHeaders keeps the page to its own origin: no outside script,
// style, frame or form target.
func setPageHeaders(w http.ResponseWriter) {
	h := w.Header()
	h.Set("Content-Security-Policy", "default-src 'self'; img-src 'self' blob: data:; media-src 'self' blob:; style-src 'self'; script-src 'self'; frame-ancestors 'none'; form-action 'none'; base-uri 'none'")
	h.Set("X-Content-Type-Options", "nosniff")
	h.Set("Referrer-Policy", "no-referrer")
	h.Set("Cache-Control", "no-store")
}

func (s *server) asset(w http.ResponseWriter, r *http.Request) {
	name := r.PathValue("file")
	var ctype string
	switch path.Ext(name) {
	case ".js":
		ctype = "text/javascript; charset=utf-8"
	case ".css":
		ctype = "text/css; charset=utf-8"
	default:
		http.NotFound(w, r)
		return
	}
	b, err := static.ReadFile("static/" + name)
	if err != nil {
		http.NotFound(w, r)
		return
	}
	setPageHeaders(w)
	w.Header().Set("Content-Type", ctype)
	w.Write(b)
}

// cameraState is one camera in the state reply.
type cameraState struct {
	CameraStatus
	Overlay      *Overlay `json:"overlay,omitempty"`
	OverlayError string   `json:"overlay_error,omitempty"`
}

// stateReply is GET APIPrefix+"state".
type stateReply struct {
	Now     time.Time     `json:"now"`
	Notice  string        `json:"notice"`
	Cameras []cameraState `json:"cameras"`
	Events  []eventReply  `json:"events"`
}

// eventReply is an Event with its evidence as URLs.
type eventReply struct {
	Event
	SnapshotURL string `json:"snapshot_url,omitempty"`
	ClipURL     string `json:"clip_url,omitempty"`
}

func (s *server) state(w http.ResponseWriter, r *http.Request) {
	ctx := r.Context()
	rep := stateReply{Now: s.o.Now(), Notice: s.o.Notice, Cameras: []cameraState{}, Events: []eventReply{}}
	for _, c := range s.b.Cameras(ctx) {
		cs := cameraState{CameraStatus: c}
		if cs.Faults == nil {
			cs.Faults = []Fault{}
		}
		ov, err := s.b.Overlay(ctx, c.ID)
		if err != nil {
			cs.OverlayError = err.Error()
		} else {
			cs.Overlay = &ov
		}
		rep.Cameras = append(rep.Cameras, cs)
	}
	for _, e := range s.b.Events(ctx, s.o.Events) {
		er := eventReply{Event: e}
		if e.Snapshot != "" {
			er.SnapshotURL = evidenceURL(e.Snapshot)
		}
		if e.Clip != "" {
			er.ClipURL = evidenceURL(e.Clip)
		}
		rep.Events = append(rep.Events, er)
	}
	writeJSON(w, http.StatusOK, rep)
}

func evidenceURL(name string) string {
	parts := strings.Split(path.Clean(name), "/")
	for i, p := range parts {
		parts[i] = url.PathEscape(p)
	}
	return APIPrefix + "evidence/" + strings.Join(parts, "/")
}

func (s *server) frame(w http.ResponseWriter, r *http.Request) {
	f, err := s.b.Frame(r.Context(), r.PathValue("id"))
	if err != nil {
		writeError(w, errStatus(err), err)
		return
	}
	h := w.Header()
	h.Set("Content-Type", "image/jpeg")
	h.Set("Cache-Control", "no-store")
	h.Set("X-Frame-Seq", strconv.FormatUint(f.Seq, 10))
	if !f.Taken.IsZero() {
		h.Set("X-Frame-Taken", f.Taken.UTC().Format(time.RFC3339Nano))
	}
	w.Write(f.JPEG)
}

func (s *server) evidence(w http.ResponseWriter, r *http.Request) {
	fsys := s.b.Evidence()
	name := r.PathValue("file")
	if fsys == nil {
		writeError(w, http.StatusNotFound, errors.New("evidence is not kept"))
		return
	}
	if !fs.ValidPath(name) || name == "." {
		writeError(w, http.StatusBadRequest, fmt.Errorf("evidence %q: not a file name", name))
		return
	}
	switch path.Ext(name) {
	case ".jpg", ".mp4", ".avi":
	default:
		writeError(w, http.StatusNotFound, fmt.Errorf("evidence %q: only snapshots and clips are served", name))
		return
	}
	st, err := fs.Stat(fsys, name)
	if err != nil || st.IsDir() {
		writeError(w, http.StatusNotFound, fmt.Errorf("evidence %q: not found (retention may have removed it)", name))
		return
	}
	w.Header().Set("Cache-Control", "private, max-age=3600")
	http.ServeFileFS(w, r, fsys, name)
}

func (s *server) calibration(w http.ResponseWriter, r *http.Request) {
	in, err := s.b.Calibration(r.Context(), r.PathValue("id"))
	if err != nil {
		writeError(w, errStatus(err), err)
		return
	}
	if in.Corners == nil {
		in.Corners = [][2]float64{}
	}
	writeJSON(w, http.StatusOK, in)
}

// decodeCalibration reads a calibration request body; the error names
// what is wrong with it.
func decodeCalibration(r *http.Request) (CalibrationInput, error) {
	var in CalibrationInput
	body, err := io.ReadAll(io.LimitReader(r.Body, maxCalibrationBody+1))
	if err != nil {
		return in, badRequest{fmt.Errorf("read body: %w", err)}
	}
	if len(body) > maxCalibrationBody {
		return in, badRequest{fmt.Errorf("body is over the %d-byte limit", maxCalibrationBody)}
	}
	dec := json.NewDecoder(bytes.NewReader(body))
	dec.DisallowUnknownFields()
	if err := dec.Decode(&in); err != nil {
		return in, badRequest{fmt.Errorf("body: %v; send a JSON object with corners, origin, outline, length_m, width_m and depth_m", err)}
	}
	if _, err := dec.Token(); !errors.Is(err, io.EOF) {
		return in, badRequest{errors.New("body: trailing data after the JSON object")}
	}
	if err := in.check(); err != nil {
		return in, err
	}
	for i, p := range in.Corners {
		if !finite(p[0], p[1]) {
			return in, &CalibrationError{Field: "corners", Point: i, Msg: "not a finite pixel position"}
		}
	}
	for i, p := range in.Outline {
		if !finite(p[0], p[1]) {
			return in, &CalibrationError{Field: "outline", Point: i, Msg: "not a finite pixel position"}
		}
	}
	if !finite(in.Length, in.Width, in.Depth) {
		return in, &CalibrationError{Field: "length_m", Point: -1, Msg: "length, width and depth must be numbers"}
	}
	return in, nil
}

func finite(vs ...float64) bool {
	for _, v := range vs {
		if math.IsNaN(v) || math.IsInf(v, 0) {
			return false
		}
	}
	return true
}

// calibrationFailure answers a refused calibration. Corner indices are
// turned back into the order the page clicked them in.
func calibrationFailure(w http.ResponseWriter, err error, origin int) {
	var ce *CalibrationError
	if errors.As(err, &ce) {
		point := ce.Point
		if ce.Field == "corners" && point >= 0 {
			point = (point + origin) % 4
		}
		writeJSON(w, http.StatusUnprocessableEntity, errorReply{Error: ce.Msg, Field: ce.Field, Point: &point})
		return
	}
	writeError(w, errStatus(err), err)
}

func (s *server) preview(w http.ResponseWriter, r *http.Request) {
	in, err := decodeCalibration(r)
	if err != nil {
		calibrationFailure(w, err, 0)
		return
	}
	p, err := s.b.PreviewCalibration(r.Context(), r.PathValue("id"), in.ordered())
	if err != nil {
		calibrationFailure(w, err, in.Origin)
		return
	}
	writeJSON(w, http.StatusOK, p)
}

func (s *server) save(w http.ResponseWriter, r *http.Request) {
	id := r.PathValue("id")
	if err := s.authorize(r); err != nil {
		code := http.StatusUnauthorized
		var rf *Refusal
		if errors.As(err, &rf) && rf.Status != 0 {
			code = rf.Status
		}
		if code == http.StatusUnauthorized {
			w.Header().Set("WWW-Authenticate", `Bearer realm="stillwater"`)
		}
		s.o.Log.Warn("calibration save refused", "camera", id, "reason", err)
		writeError(w, code, err)
		return
	}
	in, err := decodeCalibration(r)
	if err != nil {
		calibrationFailure(w, err, 0)
		return
	}
	if err := s.b.SaveCalibration(r.Context(), id, in.ordered()); err != nil {
		s.o.Log.Warn("calibration save failed", "camera", id, "err", err)
		calibrationFailure(w, err, in.Origin)
		return
	}
	s.o.Log.Info("calibration saved from the page", "camera", id)
	writeJSON(w, http.StatusOK, map[string]bool{"ok": true})
}

func (s *server) authorize(r *http.Request) error {
	if s.o.Authorize == nil {
		return &Refusal{Status: http.StatusForbidden, Why: "saving a calibration from the page is not enabled"}
	}
	return s.o.Authorize(r)
}

// errorReply is the body of every error answer.
type errorReply struct {
	Error string `json:"error"`
	Field string `json:"field,omitempty"`
	Point *int   `json:"point,omitempty"`
}

// badRequest is a request the client got wrong.
type badRequest struct{ error }

func (b badRequest) Unwrap() error { return b.error }

func errStatus(err error) int {
	var ce *CalibrationError
	var br badRequest
	switch {
	case errors.As(err, &br):
		return http.StatusBadRequest
	case errors.Is(err, ErrNoCamera):
		return http.StatusNotFound
	case errors.As(err, &ce):
		return http.StatusUnprocessableEntity
	}
	var rf *Refusal
	if errors.As(err, &rf) && rf.Status != 0 {
		return rf.Status
	}
	return http.StatusServiceUnavailable
}

func writeError(w http.ResponseWriter, code int, err error) {
	writeJSON(w, code, errorReply{Error: err.Error()})
}

func writeJSON(w http.ResponseWriter, code int, v any) {
	b, err := json.Marshal(v)
	if err != nil {
		code, b = http.StatusInternalServerError, []byte(`{"error":"encode reply"}`)
	}
	w.Header().Set("Content-Type", "application/json")
	w.Header().Set("Cache-Control", "no-store")
	w.WriteHeader(code)
	w.Write(append(b, '\n'))
}
