package arming

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
	"net"
	"net/http"
	"strconv"
	"strings"
	"sync"
	"time"
	"unicode"

	"github.com/nats-io/nats.go"

	"stillwater/alert"
)

// maxControlBody bounds a request body; real requests are under 200 bytes.
const maxControlBody = 4096

// ControlRequest is a decoded control request. Until is resolved against
// the clock for "for" durations; zero means none given.
type ControlRequest struct {
	Action string
	Camera string // a camera id or alert.AllCameras
	Until  time.Time
	// By is what the caller says about itself. It is logged as a claim
	// and never recorded as the author: that is the identity the request
	// authenticated as.
	By    string
	Token string // from the body; headers are read by the transports
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
	case alert.ActionArm, alert.ActionDisarm, alert.ActionClear, alert.ActionStatus:
	default:
		return req, fmt.Errorf("unknown action %q; want %s, %s, %s or %s", action, alert.ActionArm, alert.ActionDisarm, alert.ActionClear, alert.ActionStatus)
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
		req.Camera = alert.AllCameras
	}
	if err := alert.ValidToken(req.Camera); err != nil {
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
	case alert.ActionDisarm:
		if req.Until.IsZero() {
			return ControlRequest{}, errors.New("disarm needs until or for: a disarm always ends")
		}
		if !req.Until.After(now) {
			return ControlRequest{}, errors.New("until is not in the future")
		}
	case alert.ActionArm:
		if !req.Until.IsZero() && !req.Until.After(now) {
			return ControlRequest{}, errors.New("until is not in the future")
		}
	case alert.ActionClear, alert.ActionStatus:
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
	OK     bool    `json:"ok"`
	Error  string  `json:"error,omitempty"`
	Status *Status `json:"status,omitempty"`
}

// ControlConfig sets up a Control.
type ControlConfig struct {
	Prefix string
	Arming *Arming
	// Secret is the shared control token that arm, disarm and clear need
	// (status needs none). HTTP requests carry it as "Authorization:
	// Bearer SECRET"; NATS requests in the same header or in the body's
	// "token" field. Empty refuses every HTTP arm, disarm and clear, and
	// NATS ones except those TrustNATS accepts.
	Secret string
	// TokenName is who a request carrying the token is recorded as (the
	// override's by, "http:NAME" or "nats:NAME"); default DefaultTokenName.
	TokenName string
	// TrustNATS accepts, without a token, NATS requests on a bus user's
	// own subject PREFIX.control.USER.ACTION (alert.UserControlSubject)
	// and records them as "nats:USER". It is sound only where the server
	// lets no one but USER publish there, as the embedded server's roles
	// do: the server, not the sender, then names the author. A request on
	// the shared subject PREFIX.control.ACTION names no sender and needs
	// the token all the same.
	TrustNATS bool
	// OnRefused is called for every request refused for want of
	// authorisation; via is "http" or "nats".
	OnRefused func(via string)
	// Throttle spaces out the attempts of a client whose requests keep
	// being refused (HTTP by client address, NATS as one client); nil
	// makes one with the default delays.
	Throttle *Throttle
	Log      *slog.Logger
	Now      func() time.Time
}

// DefaultTokenName is who a request with the control token is recorded as
// when no name is configured.
const DefaultTokenName = "token-holder"

// Control answers arm, disarm, clear and status requests over HTTP and
// NATS request/reply. A refused or malformed request never changes state.
type Control struct {
	cfg      ControlConfig
	log      *slog.Logger
	throttle *Throttle
	mu       sync.RWMutex
	auth     controlAuth
}

// controlAuth is what SetAuth may change while the daemon runs.
type controlAuth struct {
	secret    [32]byte
	enabled   bool
	name      string
	trustNATS bool
}

// NewControl checks cfg and returns a Control.
func NewControl(cfg ControlConfig) (*Control, error) {
	if cfg.Arming == nil {
		return nil, errors.New("control: no arming")
	}
	if err := alert.ValidToken(cfg.Prefix); err != nil {
		return nil, fmt.Errorf("control: prefix: %v", err)
	}
	if cfg.Now == nil {
		cfg.Now = time.Now
	}
	log := cfg.Log
	if log == nil {
		log = slog.New(slog.NewTextHandler(io.Discard, nil))
	}
	th := cfg.Throttle
	if th == nil {
		th = NewThrottle(0, 0, nil)
	}
	c := &Control{cfg: cfg, log: log, throttle: th}
	if err := c.SetAuth(cfg.Secret, cfg.TokenName, cfg.TrustNATS); err != nil {
		return nil, err
	}
	return c, nil
}

// SetAuth replaces the secret, the token's name and TrustNATS, as a
// configuration reload does: from its return on, the old token is
// refused. An empty secret turns token control off.
func (c *Control) SetAuth(secret, tokenName string, trustNATS bool) error {
	if tokenName == "" {
		tokenName = DefaultTokenName
	}
	if err := validName(tokenName); err != nil {
		return fmt.Errorf("control: token name: %v", err)
	}
	a := controlAuth{secret: sha256.Sum256([]byte(secret)), enabled: secret != "", name: tokenName, trustNATS: trustNATS}
	c.mu.Lock()
	c.auth = a
	c.mu.Unlock()
	return nil
}

// validName accepts what may follow "http:" in an override's author.
func validName(s string) error {
	if s == "" || len(s) > 64 || strings.IndexFunc(s, func(r rune) bool { return !unicode.IsPrint(r) || unicode.IsSpace(r) }) >= 0 {
		return fmt.Errorf("%q: want 1 to 64 printable characters without spaces", s)
	}
	return nil
}

func (c *Control) authState() controlAuth {
	c.mu.RLock()
	defer c.mu.RUnlock()
	return c.auth
}

// tokenOK compares in constant time; hashing first hides the length too.
func (a controlAuth) tokenOK(tok string) bool {
	h := sha256.Sum256([]byte(tok))
	return a.enabled && subtle.ConstantTimeCompare(h[:], a.secret[:]) == 1
}

// authorise decides whether req may run and who it runs as (the
// override's author); the reason for a refusal goes to the log and the
// reply. user is the bus user named by a per-user NATS subject, "" for
// the shared subject and HTTP. Status is open: it tells no more than the
// armed messages every subscriber sees and the stillwater_armed metric.
func (c *Control) authorise(via, user string, req ControlRequest, header string) (who, why string, ok bool) {
	a := c.authState()
	tok := req.Token
	if via == "http" {
		tok = "" // over HTTP only the header counts: one place to keep secret
	}
	if t, ok := strings.CutPrefix(header, "Bearer "); ok {
		tok = t
	}
	switch {
	case req.Action == alert.ActionStatus:
		return "", "", true
	case via == "nats" && a.trustNATS && user != "":
		// Only user may publish on its own subject: the server says who
		// sent the request, whatever the body or a token say.
		return via + ":" + user, "", true
	case tok != "" && a.tokenOK(tok):
		return via + ":" + a.name, "", true
	case via == "nats" && a.trustNATS && tok == "":
		return "", fmt.Sprintf("the shared subject %s names no sender; send to %s to act as your bus user, or give the token",
			alert.ControlSubject(c.cfg.Prefix, req.Action), alert.UserControlSubject(c.cfg.Prefix, "YOUR-USER", req.Action)), false
	case !a.enabled:
		return "", "control is not enabled: no control secret is configured", false
	case tok == "":
		return "", "missing token", false
	}
	return "", "wrong token", false
}

// needsAuth reports whether action changes state, and so is throttled.
func needsAuth(action string) bool { return action != alert.ActionStatus }

func (c *Control) refuse(via, user string, req ControlRequest, why string) {
	c.log.Warn("control request refused", "via", via, "action", req.Action, "camera", req.Camera, "claimed_by", req.By, "subject_user", user, "reason", why)
	if c.cfg.OnRefused != nil {
		c.cfg.OnRefused(via)
	}
}

// tooMany is the reason given when a throttled client's attempt is
// refused unjudged.
const tooMany = "too many refused attempts from this client; wait and try again"

// apply runs an authorised request as by; user is the per-user subject's
// user, for the log.
func (c *Control) apply(via, user, by string, req ControlRequest, now time.Time) ControlReply {
	var err error
	switch req.Action {
	case alert.ActionArm:
		err = c.cfg.Arming.Arm(req.Camera, req.Until, by, now)
	case alert.ActionDisarm:
		err = c.cfg.Arming.DisarmUntil(req.Camera, req.Until, by, now)
	case alert.ActionClear:
		err = c.cfg.Arming.Clear(req.Camera, by, now)
	case alert.ActionStatus:
		if req.Camera != alert.AllCameras {
			if _, err := c.cfg.Arming.targets(req.Camera); err != nil {
				return ControlReply{Error: err.Error()}
			}
		}
	}
	if err != nil {
		return ControlReply{Error: err.Error()}
	}
	if req.Action != alert.ActionStatus {
		c.log.Info("control request applied", "via", via, "action", req.Action, "camera", req.Camera, "by", by, "claimed_by", req.By, "subject_user", user)
	}
	st := c.cfg.Arming.Status(now)
	if req.Camera != alert.AllCameras {
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
// token, 403 control not enabled, 404, 405, and 429 when a client whose
// attempts keep being refused sends more than its throttle lets through.
func (c *Control) Handler() http.Handler {
	return http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		action, ok := strings.CutPrefix(r.URL.Path, "/control/")
		if !ok {
			writeReply(w, http.StatusNotFound, ControlReply{Error: "not found"})
			return
		}
		want := http.MethodPost
		if action == alert.ActionStatus {
			want = http.MethodGet
		}
		switch action {
		case alert.ActionArm, alert.ActionDisarm, alert.ActionClear, alert.ActionStatus:
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
		client := clientAddr(r)
		if needsAuth(action) {
			if _, ok := c.throttle.Wait(r.Context(), client); !ok {
				c.refuse("http", "", ControlRequest{Action: action}, tooMany)
				w.Header().Set("Retry-After", strconv.Itoa(int(c.throttle.max/time.Second)))
				writeReply(w, http.StatusTooManyRequests, ControlReply{Error: "refused: " + tooMany})
				return
			}
		}
		now := c.cfg.Now()
		req, derr := DecodeControl(action, body, now)
		if derr != nil {
			req = ControlRequest{Action: action, Token: bodyToken(body)}
		}
		// Authorise before reporting decoding errors, so that an
		// unauthorised caller learns nothing and is counted.
		who, why, ok := c.authorise("http", "", req, r.Header.Get("Authorization"))
		if !ok {
			c.throttle.Refused(client)
			c.refuse("http", "", req, why)
			code := http.StatusUnauthorized
			if !c.authState().enabled {
				code = http.StatusForbidden
			} else {
				w.Header().Set("WWW-Authenticate", `Bearer realm="stillwater"`)
			}
			writeReply(w, code, ControlReply{Error: "refused: " + why})
			return
		}
		if needsAuth(action) {
			c.throttle.Accepted(client)
		}
		if derr != nil {
			writeReply(w, http.StatusBadRequest, ControlReply{Error: derr.Error()})
			return
		}
		rep := c.apply("http", "", who, req, now)
		code := http.StatusOK
		if !rep.OK {
			code = http.StatusBadRequest
		}
		writeReply(w, code, rep)
	})
}

// clientAddr is the throttle's key for an HTTP request: the peer's IP
// address (behind a reverse proxy, the proxy's).
func clientAddr(r *http.Request) string {
	host, _, err := net.SplitHostPort(r.RemoteAddr)
	if err != nil {
		return r.RemoteAddr
	}
	return host
}

func writeReply(w http.ResponseWriter, code int, rep ControlReply) {
	b, _ := json.Marshal(rep)
	w.Header().Set("Content-Type", "application/json")
	w.WriteHeader(code)
	w.Write(append(b, '\n'))
}

// Serve answers requests on PREFIX.control.ACTION and
// PREFIX.control.USER.ACTION until ctx ends.
func (c *Control) Serve(ctx context.Context, nc *nats.Conn) error {
	answer := func(m *nats.Msg) {
		rep := c.handleNATS(ctx, m)
		if m.Reply == "" {
			return
		}
		b, _ := json.Marshal(rep)
		if err := m.Respond(b); err != nil {
			c.log.Warn("control reply failed", "err", err)
		}
	}
	var subs []*nats.Subscription
	defer func() {
		for _, sub := range subs {
			sub.Unsubscribe()
		}
	}()
	for _, subj := range alert.ControlSubjects(c.cfg.Prefix) {
		sub, err := nc.Subscribe(subj, func(m *nats.Msg) {
			// A throttled request waits in its own goroutine, so that it
			// holds up neither status requests nor the subscription.
			if c.throttle.Pending(natsClient) {
				go answer(m)
				return
			}
			answer(m)
		})
		if err != nil {
			return fmt.Errorf("control: subscribe %s: %w", subj, err)
		}
		subs = append(subs, sub)
	}
	<-ctx.Done()
	for _, sub := range subs {
		if err := sub.Unsubscribe(); err != nil && !errors.Is(err, nats.ErrConnectionClosed) {
			return fmt.Errorf("control: unsubscribe %s: %w", sub.Subject, err)
		}
	}
	subs = nil
	return nil
}

// natsClient is the throttle's key for NATS requests: the subscriber
// cannot tell one sender from another. A user named by a per-user subject
// is not a key of its own, since without TrustNATS anyone may claim any
// name, and a guesser could take a fresh delay with each.
const natsClient = "nats"

func (c *Control) handleNATS(ctx context.Context, m *nats.Msg) ControlReply {
	user, action, ok := alert.ParseControlSubject(c.cfg.Prefix, m.Subject)
	if !ok {
		return ControlReply{Error: fmt.Sprintf("subject %s is not a control subject", m.Subject)}
	}
	if user != "" {
		if err := validName(user); err != nil {
			c.refuse("nats", user, ControlRequest{Action: action}, "bus user in the subject: "+err.Error())
			return ControlReply{Error: "refused: bus user in the subject: " + err.Error()}
		}
	}
	// A request on its sender's own subject, under TrustNATS, is vouched
	// for by the server: it does not queue behind refused guesses.
	vouched := user != "" && c.authState().trustNATS
	if needsAuth(action) && !vouched {
		if _, ok := c.throttle.Wait(ctx, natsClient); !ok {
			c.refuse("nats", user, ControlRequest{Action: action}, tooMany)
			return ControlReply{Error: "refused: " + tooMany}
		}
	}
	now := c.cfg.Now()
	req, derr := DecodeControl(action, m.Data, now)
	if derr != nil {
		req = ControlRequest{Action: action, Token: bodyToken(m.Data)}
	}
	header := ""
	if m.Header != nil {
		header = m.Header.Get("Authorization")
	}
	who, why, ok := c.authorise("nats", user, req, header)
	if !ok {
		c.throttle.Refused(natsClient)
		c.refuse("nats", user, req, why)
		return ControlReply{Error: "refused: " + why}
	}
	if needsAuth(action) && !vouched {
		c.throttle.Accepted(natsClient)
	}
	if derr != nil {
		return ControlReply{Error: derr.Error()}
	}
	return c.apply("nats", user, who, req, now)
}
