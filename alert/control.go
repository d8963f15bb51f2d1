package alert

import (
	"bytes"
	"context"
	"crypto/sha256"
	"crypto/subtle"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"net/http"
	"strings"
	"time"
	"unicode"

	"github.com/nats-io/nats.go"
)

// Control actions: the last token of PREFIX.control.ACTION and of the
// HTTP path /control/ACTION.
const (
	ActionArm    = "arm"
	ActionDisarm = "disarm"
	ActionClear  = "clear"
	ActionStatus = "status"
)

// ControlSubject returns the NATS subject of a control action.
func ControlSubject(prefix, action string) string { return prefix + ".control." + action }

// maxControlBody bounds a request body; real requests are under 200 bytes.
const maxControlBody = 4096

// ControlRequest is a decoded control request. Until is resolved against
// the clock for "for" durations; zero means none given.
type ControlRequest struct {
	Action string
	Camera string // a camera id or AllCameras
	Until  time.Time
	By     string
	Token  string // from the body; headers are read by the transports
}

// controlBody is the JSON body of a request. Every field is optional;
// until (RFC 3339 with an offset) and for (a Go duration such as "2h") are
// mutually exclusive.
type controlBody struct {
	Camera string `json:"camera,omitempty"`
	Until  string `json:"until,omitempty"`
	For    string `json:"for,omitempty"`
	By     string `json:"by,omitempty"`
	Token  string `json:"token,omitempty"`
}

// DecodeControl parses a request for action from body at now. An empty
// body is the same as {}. The error says what is wrong for the reply.
func DecodeControl(action string, body []byte, now time.Time) (ControlRequest, error) {
	var req ControlRequest
	switch action {
	case ActionArm, ActionDisarm, ActionClear, ActionStatus:
	default:
		return req, fmt.Errorf("unknown action %q; want %s, %s, %s or %s", action, ActionArm, ActionDisarm, ActionClear, ActionStatus)
	}
	if len(body) > maxControlBody {
		return req, fmt.Errorf("body of %d bytes is over the %d-byte limit", len(body), maxControlBody)
	}
	var b controlBody
	if len(bytes.TrimSpace(body)) > 0 {
		dec := json.NewDecoder(bytes.NewReader(body))
		dec.DisallowUnknownFields()
		if err := dec.Decode(&b); err != nil {
			return req, fmt.Errorf("body: %v; send a JSON object such as {\"camera\":\"all\",\"for\":\"2h\"}", err)
		}
		if _, err := dec.Token(); !errors.Is(err, io.EOF) {
			return req, errors.New("body: trailing data after the JSON object")
		}
	}
	req = ControlRequest{Action: action, Camera: b.Camera, By: b.By, Token: b.Token}
	if req.Camera == "" {
		req.Camera = AllCameras
	}
	if err := ValidToken(req.Camera); err != nil {
		return ControlRequest{}, fmt.Errorf("camera: %v", err)
	}
	if len(req.By) > 64 || strings.IndexFunc(req.By, func(r rune) bool { return !unicode.IsPrint(r) }) >= 0 {
		return ControlRequest{}, errors.New("by: at most 64 printable characters")
	}
	if b.Until != "" && b.For != "" {
		return ControlRequest{}, errors.New("give until or for, not both")
	}
	if b.Until != "" {
		t, err := time.Parse(time.RFC3339, b.Until)
		if err != nil {
			return ControlRequest{}, fmt.Errorf("until %q: want RFC 3339 with an offset, e.g. 2026-12-02T18:30:00+01:00", b.Until)
		}
		req.Until = t
	}
	if b.For != "" {
		d, err := time.ParseDuration(b.For)
		if err != nil || d <= 0 {
			return ControlRequest{}, fmt.Errorf("for %q: want a positive duration such as 90m or 2h", b.For)
		}
		req.Until = now.Add(d)
	}
	switch action {
	case ActionDisarm:
		if req.Until.IsZero() {
			return ControlRequest{}, errors.New("disarm needs until or for: a disarm always ends")
		}
		if !req.Until.After(now) {
			return ControlRequest{}, errors.New("until is not in the future")
		}
	case ActionArm:
		if !req.Until.IsZero() && !req.Until.After(now) {
			return ControlRequest{}, errors.New("until is not in the future")
		}
	case ActionClear, ActionStatus:
		if !req.Until.IsZero() {
			return ControlRequest{}, fmt.Errorf("%s takes no until or for", action)
		}
	}
	return req, nil
}

// bodyToken digs the token out of a body that failed to decode, so that
// an authorised sender of a malformed request hears what is malformed.
func bodyToken(body []byte) string {
	var b struct {
		Token string `json:"token"`
	}
	if len(body) > maxControlBody || json.Unmarshal(body, &b) != nil {
		return ""
	}
	return b.Token
}

// ControlReply is the JSON answer to every control request.
type ControlReply struct {
	OK     bool          `json:"ok"`
	Error  string        `json:"error,omitempty"`
	Status *ArmingStatus `json:"status,omitempty"`
}

// ControlConfig sets up a Control.
type ControlConfig struct {
	Prefix string
	Arming *Arming
	// Secret is the shared control token that arm, disarm and clear need
	// (status needs none). HTTP requests carry it as "Authorization:
	// Bearer SECRET"; NATS requests in the same header or in the body's
	// "token" field. Empty refuses every HTTP arm, disarm and clear, and
	// NATS ones unless TrustNATS.
	Secret string
	// TrustNATS accepts NATS requests without a token, leaving the
	// decision to the server's user permissions (RoleOperator).
	TrustNATS bool
	// OnRefused is called for every request refused for want of
	// authorisation; via is "http" or "nats".
	OnRefused func(via string)
	Log       *slog.Logger
	Now       func() time.Time
}

// Control answers arm, disarm, clear and status requests over HTTP and
// NATS request/reply. A refused or malformed request never changes state.
type Control struct {
	cfg    ControlConfig
	secret [32]byte
	log    *slog.Logger
}

// NewControl checks cfg and returns a Control.
func NewControl(cfg ControlConfig) (*Control, error) {
	if cfg.Arming == nil {
		return nil, errors.New("control: no arming")
	}
	if err := ValidToken(cfg.Prefix); err != nil {
		return nil, fmt.Errorf("control: prefix: %v", err)
	}
	if cfg.Now == nil {
		cfg.Now = time.Now
	}
	log := cfg.Log
	if log == nil {
		log = slog.New(slog.NewTextHandler(io.Discard, nil))
	}
	return &Control{cfg: cfg, secret: sha256.Sum256([]byte(cfg.Secret)), log: log}, nil
}

// tokenOK compares in constant time; hashing first hides the length too.
func (c *Control) tokenOK(tok string) bool {
	h := sha256.Sum256([]byte(tok))
	return c.cfg.Secret != "" && subtle.ConstantTimeCompare(h[:], c.secret[:]) == 1
}

// authorise decides whether req may run; the reason goes to the log and
// the reply. Status is open: it tells no more than the armed messages
// every subscriber sees and the stillwater_armed metric.
func (c *Control) authorise(via string, req ControlRequest, header string) (string, bool) {
	tok := req.Token
	if via == "http" {
		tok = "" // over HTTP only the header counts: one place to keep secret
	}
	if t, ok := strings.CutPrefix(header, "Bearer "); ok {
		tok = t
	}
	switch {
	case req.Action == ActionStatus:
		return "", true
	case via == "nats" && c.cfg.TrustNATS:
		return "", true
	case c.cfg.Secret == "":
		return "control is not enabled: no control secret is configured", false
	case tok == "":
		return "missing token", false
	case !c.tokenOK(tok):
		return "wrong token", false
	}
	return "", true
}

func (c *Control) refuse(via string, req ControlRequest, why string) {
	c.log.Warn("control request refused", "via", via, "action", req.Action, "camera", req.Camera, "by", req.By, "reason", why)
	if c.cfg.OnRefused != nil {
		c.cfg.OnRefused(via)
	}
}

// apply runs an authorised request.
func (c *Control) apply(via string, req ControlRequest, now time.Time) ControlReply {
	by := via
	if req.By != "" {
		by += ":" + req.By
	}
	var err error
	switch req.Action {
	case ActionArm:
		err = c.cfg.Arming.Arm(req.Camera, req.Until, by, now)
	case ActionDisarm:
		err = c.cfg.Arming.DisarmUntil(req.Camera, req.Until, by, now)
	case ActionClear:
		err = c.cfg.Arming.Clear(req.Camera, by, now)
	case ActionStatus:
		if req.Camera != AllCameras {
			if _, err := c.cfg.Arming.targets(req.Camera); err != nil {
				return ControlReply{Error: err.Error()}
			}
		}
	}
	if err != nil {
		return ControlReply{Error: err.Error()}
	}
	if req.Action != ActionStatus {
		c.log.Info("control request applied", "via", via, "action", req.Action, "camera", req.Camera, "by", by)
	}
	st := c.cfg.Arming.Status(now)
	if req.Camera != AllCameras {
		rows := st.Cameras[:0]
		for _, r := range st.Cameras {
			if r.Camera == req.Camera {
				rows = append(rows, r)
			}
		}
		st.Cameras = rows
	}
	return ControlReply{OK: true, Status: &st}
}

// Handler serves POST /control/arm, /control/disarm, /control/clear and
// GET /control/status; mount it at "/control/". Replies are JSON
// ControlReply: 200, 400 malformed or not possible, 401 missing or wrong
// token, 403 control not enabled, 404 and 405.
func (c *Control) Handler() http.Handler {
	return http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		action, ok := strings.CutPrefix(r.URL.Path, "/control/")
		if !ok {
			writeReply(w, http.StatusNotFound, ControlReply{Error: "not found"})
			return
		}
		want := http.MethodPost
		if action == ActionStatus {
			want = http.MethodGet
		}
		switch action {
		case ActionArm, ActionDisarm, ActionClear, ActionStatus:
		default:
			writeReply(w, http.StatusNotFound, ControlReply{Error: fmt.Sprintf("no action %q; use /control/arm, /control/disarm, /control/clear or /control/status", action)})
			return
		}
		if r.Method != want {
			w.Header().Set("Allow", want)
			writeReply(w, http.StatusMethodNotAllowed, ControlReply{Error: fmt.Sprintf("/control/%s takes %s", action, want)})
			return
		}
		body, err := io.ReadAll(io.LimitReader(r.Body, maxControlBody+1))
		if err != nil {
			writeReply(w, http.StatusBadRequest, ControlReply{Error: "read body: " + err.Error()})
			return
		}
		now := c.cfg.Now()
		req, derr := DecodeControl(action, body, now)
		if derr != nil {
			req = ControlRequest{Action: action, Token: bodyToken(body)}
		}
		// Authorise before reporting decoding errors, so that an
		// unauthorised caller learns nothing and is counted.
		if why, ok := c.authorise("http", req, r.Header.Get("Authorization")); !ok {
			c.refuse("http", req, why)
			code := http.StatusUnauthorized
			if c.cfg.Secret == "" {
				code = http.StatusForbidden
			} else {
				w.Header().Set("WWW-Authenticate", `Bearer realm="stillwater"`)
			}
			writeReply(w, code, ControlReply{Error: "refused: " + why})
			return
		}
		if derr != nil {
			writeReply(w, http.StatusBadRequest, ControlReply{Error: derr.Error()})
			return
		}
		rep := c.apply("http", req, now)
		code := http.StatusOK
		if !rep.OK {
			code = http.StatusBadRequest
		}
		writeReply(w, code, rep)
	})
}

func writeReply(w http.ResponseWriter, code int, rep ControlReply) {
	b, _ := json.Marshal(rep)
	w.Header().Set("Content-Type", "application/json")
	w.WriteHeader(code)
	w.Write(append(b, '\n'))
}

// Serve answers requests on PREFIX.control.* until ctx ends.
func (c *Control) Serve(ctx context.Context, nc *nats.Conn) error {
	sub, err := nc.Subscribe(ControlSubject(c.cfg.Prefix, "*"), func(m *nats.Msg) {
		rep := c.handleNATS(m)
		if m.Reply == "" {
			return
		}
		b, _ := json.Marshal(rep)
		if err := m.Respond(b); err != nil {
			c.log.Warn("control reply failed", "err", err)
		}
	})
	if err != nil {
		return fmt.Errorf("control: subscribe %s: %w", ControlSubject(c.cfg.Prefix, "*"), err)
	}
	<-ctx.Done()
	if err := sub.Unsubscribe(); err != nil && !errors.Is(err, nats.ErrConnectionClosed) {
		return fmt.Errorf("control: unsubscribe: %w", err)
	}
	return nil
}

func (c *Control) handleNATS(m *nats.Msg) ControlReply {
	action := m.Subject[strings.LastIndexByte(m.Subject, '.')+1:]
	now := c.cfg.Now()
	req, derr := DecodeControl(action, m.Data, now)
	if derr != nil {
		req = ControlRequest{Action: action, Token: bodyToken(m.Data)}
	}
	header := ""
	if m.Header != nil {
		header = m.Header.Get("Authorization")
	}
	if why, ok := c.authorise("nats", req, header); !ok {
		c.refuse("nats", req, why)
		return ControlReply{Error: "refused: " + why}
	}
	if derr != nil {
		return ControlReply{Error: derr.Error()}
	}
	return c.apply("nats", req, now)
}
