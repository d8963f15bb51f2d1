package daemon

import (
	"crypto/sha256"
	"crypto/subtle"
	"encoding/json"
	"log/slog"
	"net"
	"net/http"
	"strconv"
	"strings"
	"sync"
	"time"

	"stillwater/alert/arming"
	"stillwater/cmd/stillwater/internal/config"
)

// access is who may do what over HTTP and NATS, secrets resolved: the
// part of the configuration a reload swaps in place.
type access struct {
	control   string // control token; empty refuses arm, disarm and clear
	tokenName string // recorded as the author of what the token does
	trustNATS bool
	viewer    string // picture token; empty leaves only the control token
}

// accessOf resolves the control and viewer secrets. The warnings, to be
// logged, are the viewer secret's: openBus already logs the control
// secret's when it opens the control API. A secret that cannot be read is
// an error naming its field.
func accessOf(c config.Config, getenv func(string) string) (access, []string, error) {
	var warn, ctlWarn []string
	ctl, err := config.ResolveSecret("control.secret", c.Control.Secret, c.Control.SecretEnv, c.Control.SecretFile, getenv, &ctlWarn)
	if err != nil {
		return access{}, nil, err
	}
	view, err := config.ResolveSecret("http.viewer_secret", c.HTTP.ViewerSecret, c.HTTP.ViewerSecretEnv, c.HTTP.ViewerSecretFile, getenv, &warn)
	if err != nil {
		return access{}, nil, err
	}
	return access{control: ctl, tokenName: c.Control.TokenName, trustNATS: c.Control.TrustNATS, viewer: view}, warn, nil
}

// LoopbackListen reports whether a listen address reaches this machine
// only. An empty host or a host name other than localhost counts as
// reachable from outside.
func LoopbackListen(addr string) bool {
	host, _, err := net.SplitHostPort(addr)
	if err != nil {
		return false
	}
	if host == "localhost" {
		return true
	}
	ip := net.ParseIP(host)
	return ip != nil && ip.IsLoopback()
}

// pictureGate guards the live camera pictures. On a loopback listener
// they are open, as /metrics is; otherwise a request needs a bearer token,
// the viewer's or the control one, and a client whose tokens keep being
// refused is slowed like a control client.
type pictureGate struct {
	open     bool
	throttle *arming.Throttle
	mu       sync.RWMutex
	tokens   [][32]byte
}

func newPictureGate(listen string) *pictureGate {
	return &pictureGate{open: LoopbackListen(listen), throttle: arming.NewThrottle(0, 0, nil)}
}

// set swaps the accepted tokens, as a reload does.
func (g *pictureGate) set(a access) {
	var toks [][32]byte
	for _, s := range []string{a.viewer, a.control} {
		if s != "" {
			toks = append(toks, sha256.Sum256([]byte(s)))
		}
	}
	g.mu.Lock()
	g.tokens = toks
	g.mu.Unlock()
}

func (g *pictureGate) ok(tok string) bool {
	g.mu.RLock()
	defer g.mu.RUnlock()
	h := sha256.Sum256([]byte(tok))
	good := 0
	for _, t := range g.tokens {
		good |= subtle.ConstantTimeCompare(h[:], t[:])
	}
	return tok != "" && good == 1
}

func (g *pictureGate) configured() bool {
	g.mu.RLock()
	defer g.mu.RUnlock()
	return len(g.tokens) > 0
}

// wrap puts the gate in front of h.
func (g *pictureGate) wrap(h http.Handler) http.Handler {
	return http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		if g.open {
			h.ServeHTTP(w, r)
			return
		}
		if !g.configured() {
			pictureRefusal(w, http.StatusForbidden, "camera pictures need a token on a listener that is not loopback; set http.viewer_secret_env or http.viewer_secret_file")
			return
		}
		client := r.RemoteAddr
		if host, _, err := net.SplitHostPort(client); err == nil {
			client = host
		}
		if _, ok := g.throttle.Wait(r.Context(), client); !ok {
			w.Header().Set("Retry-After", strconv.Itoa(int(arming.DefaultRefusalMax/time.Second)))
			pictureRefusal(w, http.StatusTooManyRequests, "too many refused attempts from this client; wait and try again")
			return
		}
		tok, _ := strings.CutPrefix(r.Header.Get("Authorization"), "Bearer ")
		if !g.ok(tok) {
			g.throttle.Refused(client)
			w.Header().Set("WWW-Authenticate", `Bearer realm="stillwater"`)
			pictureRefusal(w, http.StatusUnauthorized, "missing or wrong token")
			return
		}
		g.throttle.Accepted(client)
		h.ServeHTTP(w, r)
	})
}

func pictureRefusal(w http.ResponseWriter, code int, why string) {
	b, _ := json.Marshal(map[string]string{"error": why})
	w.Header().Set("Content-Type", "application/json")
	w.WriteHeader(code)
	w.Write(append(b, '\n'))
}

// httpTimeouts bound how long a client may take over each part of an
// exchange, so that slow or stalled clients cannot hold connections.
type httpTimeouts struct {
	ReadHeader time.Duration // request line and headers
	Read       time.Duration // the whole request, body included
	Write      time.Duration // from the end of the headers to the end of the reply
	Idle       time.Duration // a kept-alive connection waiting for its next request
}

// DefaultHTTPTimeouts suit the daemon's requests (control bodies under
// 4 KiB, a picture or the metrics page in the reply). Write covers the
// longest refusal delay a throttled control client can be made to wait.
func DefaultHTTPTimeouts() httpTimeouts {
	return httpTimeouts{ReadHeader: 5 * time.Second, Read: 10 * time.Second, Write: 30 * time.Second, Idle: 10 * time.Second}
}

// newHTTPServer returns the daemon's HTTP server for h.
func newHTTPServer(h http.Handler, t httpTimeouts, log *slog.Logger) *http.Server {
	return &http.Server{
		Handler:           h,
		ReadHeaderTimeout: t.ReadHeader,
		ReadTimeout:       t.Read,
		WriteTimeout:      t.Write,
		IdleTimeout:       t.Idle,
		MaxHeaderBytes:    16 << 10,
		ErrorLog:          slog.NewLogLogger(log.Handler(), slog.LevelWarn),
	}
}
