package alert

import (
	"context"
	"encoding/json"
	"net/http"
	"net/http/httptest"
	"strings"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

var ctlNow = time.Date(2026, 12, 2, 12, 0, 0, 0, time.UTC)

func TestDecodeControl(t *testing.T) {
	cases := []struct {
		name, action, body string
		want               ControlRequest
		err                string
	}{
		{"status empty", ActionStatus, "", ControlRequest{Action: ActionStatus, Camera: AllCameras}, ""},
		{"disarm until with offset", ActionDisarm, `{"camera":"all","until":"2026-12-02T18:30:00+01:00"}`,
			ControlRequest{Action: ActionDisarm, Camera: AllCameras, Until: time.Date(2026, 12, 2, 17, 30, 0, 0, time.UTC)}, ""},
		{"disarm for", ActionDisarm, `{"camera":"north","for":"2h","by":"alice"}`,
			ControlRequest{Action: ActionDisarm, Camera: "north", Until: ctlNow.Add(2 * time.Hour), By: "alice"}, ""},
		{"arm no end", ActionArm, `{}`, ControlRequest{Action: ActionArm, Camera: AllCameras}, ""},
		{"token kept", ActionClear, `{"token":"abc"}`, ControlRequest{Action: ActionClear, Camera: AllCameras, Token: "abc"}, ""},
		{"unknown action", "explode", `{}`, ControlRequest{}, `unknown action "explode"`},
		{"disarm without end", ActionDisarm, `{"camera":"north"}`, ControlRequest{}, "a disarm always ends"},
		{"both", ActionDisarm, `{"until":"2026-12-02T18:30:00Z","for":"1h"}`, ControlRequest{}, "not both"},
		{"no offset", ActionDisarm, `{"until":"2026-12-02T18:30:00"}`, ControlRequest{}, "RFC 3339 with an offset"},
		{"past", ActionDisarm, `{"until":"2026-12-02T11:00:00Z"}`, ControlRequest{}, "not in the future"},
		{"negative for", ActionDisarm, `{"for":"-1h"}`, ControlRequest{}, "positive duration"},
		{"bad camera", ActionArm, `{"camera":"a.b"}`, ControlRequest{}, "camera:"},
		{"unknown field", ActionArm, `{"camra":"north"}`, ControlRequest{}, `unknown field "camra"`},
		{"trailing", ActionArm, `{} {}`, ControlRequest{}, "trailing data"},
		{"not an object", ActionArm, `[1]`, ControlRequest{}, "JSON object"},
		{"wrong type", ActionArm, `{"camera":7}`, ControlRequest{}, "body:"},
		{"status with for", ActionStatus, `{"for":"1h"}`, ControlRequest{}, "takes no until or for"},
		{"by too long", ActionArm, `{"by":"` + strings.Repeat("x", 65) + `"}`, ControlRequest{}, "at most 64"},
		{"by control char", ActionArm, `{"by":"a\u0007"}`, ControlRequest{}, "printable"},
		{"huge", ActionArm, `{"by":"` + strings.Repeat("x", 5000) + `"}`, ControlRequest{}, "limit"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			got, err := DecodeControl(c.action, []byte(c.body), ctlNow)
			if c.err != "" {
				require.Error(t, err)
				assert.Contains(t, err.Error(), c.err)
				assert.Equal(t, ControlRequest{}, got)
				return
			}
			require.NoError(t, err)
			assert.True(t, c.want.Until.Equal(got.Until), "until %v, want %v", got.Until, c.want.Until)
			got.Until, c.want.Until = time.Time{}, time.Time{}
			assert.Equal(t, c.want, got)
		})
	}
}

// FuzzDecodeControl checks that the decoder never panics, that what it
// accepts is well-formed, and that re-encoding an accepted request decodes
// to the same request.
func FuzzDecodeControl(f *testing.F) {
	for _, s := range []struct{ action, body string }{
		{ActionDisarm, `{"camera":"all","until":"2026-12-02T18:30:00+01:00"}`},
		{ActionDisarm, `{"camera":"north","for":"2h","by":"alice","token":"t"}`},
		{ActionArm, `{}`},
		{ActionStatus, ``},
		{ActionClear, `{"camera":"pool"}`},
		{"bogus", `{"for":"1h"}`},
	} {
		f.Add(s.action, []byte(s.body))
	}
	f.Fuzz(func(t *testing.T, action string, body []byte) {
		req, err := DecodeControl(action, body, ctlNow)
		if err != nil {
			if err.Error() == "" {
				t.Fatal("empty error")
			}
			return
		}
		if ValidToken(req.Camera) != nil {
			t.Fatalf("accepted camera %q", req.Camera)
		}
		if req.Action == ActionDisarm && !req.Until.After(ctlNow) {
			t.Fatalf("accepted a disarm ending %v", req.Until)
		}
		b := controlBody{Camera: req.Camera, By: req.By, Token: req.Token}
		if !req.Until.IsZero() {
			b.Until = req.Until.Format(time.RFC3339Nano)
		}
		enc, err := json.Marshal(b)
		if err != nil {
			t.Fatal(err)
		}
		again, err := DecodeControl(req.Action, enc, ctlNow)
		if err != nil {
			t.Fatalf("re-encoded %s refused: %v", enc, err)
		}
		if !again.Until.Equal(req.Until) || again.Camera != req.Camera || again.By != req.By || again.Token != req.Token {
			t.Fatalf("round trip changed %+v into %+v", req, again)
		}
	})
}

func TestControlWithoutSecretRefusesChanges(t *testing.T) {
	a, err := NewArming(ArmingConfig{Cameras: []string{"north"}}, ctlNow)
	require.NoError(t, err)
	refused := 0
	c, err := NewControl(ControlConfig{Prefix: "sw", Arming: a, Now: func() time.Time { return ctlNow }, OnRefused: func(string) { refused++ }})
	require.NoError(t, err)
	h := c.Handler()
	for _, tok := range []string{"", "Bearer ", "Bearer anything"} {
		req := httptest.NewRequest("POST", "/control/disarm", strings.NewReader(`{"for":"1h"}`))
		if tok != "" {
			req.Header.Set("Authorization", tok)
		}
		w := httptest.NewRecorder()
		h.ServeHTTP(w, req)
		assert.Equal(t, http.StatusForbidden, w.Code, "token %q", tok)
		assert.Contains(t, w.Body.String(), "no control secret is configured")
	}
	assert.Equal(t, 3, refused)
	armed, _ := a.Armed("north", ctlNow)
	assert.True(t, armed)
	rep := c.handleNATS(context.Background(), &nats.Msg{Subject: "sw.control.disarm", Data: []byte(`{"for":"1h","token":""}`)})
	assert.False(t, rep.OK)
	assert.Equal(t, 4, refused)
	rep = c.handleNATS(context.Background(), &nats.Msg{Subject: "sw.control.status"})
	assert.True(t, rep.OK, rep.Error)
}

// newTestControl returns a Control over one camera, north, with secret s3.
func newTestControl(t *testing.T, cfg ControlConfig) (*Control, *Arming) {
	t.Helper()
	a, err := NewArming(ArmingConfig{Cameras: []string{"north"}}, ctlNow)
	require.NoError(t, err)
	cfg.Prefix, cfg.Arming = "sw", a
	if cfg.Now == nil {
		cfg.Now = func() time.Time { return ctlNow }
	}
	c, err := NewControl(cfg)
	require.NoError(t, err)
	return c, a
}

// post sends an HTTP control request from addr and returns the code.
func post(h http.Handler, addr, action, auth, body string) int {
	req := httptest.NewRequest("POST", "/control/"+action, strings.NewReader(body))
	req.RemoteAddr = addr
	if auth != "" {
		req.Header.Set("Authorization", auth)
	}
	w := httptest.NewRecorder()
	h.ServeHTTP(w, req)
	return w.Code
}

// The author recorded with an override is who the request authenticated
// as, whatever the body's by says.
func TestControlRecordsAuthenticatedIdentity(t *testing.T) {
	cases := []struct {
		name   string
		cfg    ControlConfig
		via    string
		header string
		body   string
		want   string
	}{
		{"http token", ControlConfig{Secret: "s3", TokenName: "alice"}, "http", "Bearer s3", `{"for":"1h","by":"mallory"}`, "http:alice"},
		{"http default name", ControlConfig{Secret: "s3"}, "http", "Bearer s3", `{"for":"1h","by":"mallory"}`, "http:" + DefaultTokenName},
		{"nats token in body", ControlConfig{Secret: "s3", TokenName: "alice"}, "nats", "", `{"for":"1h","by":"mallory","token":"s3"}`, "nats:alice"},
		{"nats trusted", ControlConfig{TrustNATS: true}, "nats", "", `{"for":"1h","by":"mallory"}`, "nats:" + TrustedNATSName},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			c, a := newTestControl(t, tc.cfg)
			if tc.via == "http" {
				require.Equal(t, http.StatusOK, post(c.Handler(), "192.0.2.1:5000", ActionDisarm, tc.header, tc.body))
			} else {
				rep := c.handleNATS(context.Background(), &nats.Msg{Subject: "sw.control.disarm", Data: []byte(tc.body)})
				require.True(t, rep.OK, rep.Error)
			}
			st := a.Status(ctlNow)
			require.NotNil(t, st.Cameras[0].Override)
			assert.Equal(t, tc.want, st.Cameras[0].Override.By)
			assert.NotContains(t, st.Cameras[0].Reason, "mallory")
		})
	}
}

// SetAuth swaps the token at once: the old one is refused on the next
// request, the new one accepted.
func TestControlSetAuthRotatesToken(t *testing.T) {
	c, _ := newTestControl(t, ControlConfig{Secret: "old-token", Throttle: NewThrottle(time.Millisecond, 2*time.Millisecond, nil)})
	h := c.Handler()
	require.Equal(t, http.StatusOK, post(h, "192.0.2.1:1", ActionArm, "Bearer old-token", `{}`))
	require.NoError(t, c.SetAuth("new-token", "owner", false))
	assert.Equal(t, http.StatusUnauthorized, post(h, "192.0.2.1:1", ActionArm, "Bearer old-token", `{}`))
	time.Sleep(5 * time.Millisecond) // let the throttle's delay pass
	assert.Equal(t, http.StatusOK, post(h, "192.0.2.1:1", ActionArm, "Bearer new-token", `{}`))
	require.NoError(t, c.SetAuth("", "owner", false))
	assert.Equal(t, http.StatusForbidden, post(h, "192.0.2.1:1", ActionArm, "Bearer new-token", `{}`))
	assert.Error(t, c.SetAuth("x", "two words", false))
}

// Repeated wrong tokens from one address are answered later and later;
// a client at another address is not held up meanwhile; a burst from the
// throttled address gains nothing (429 past the bound).
func TestControlSlowsRepeatedRefusals(t *testing.T) {
	const base = 40 * time.Millisecond
	c, _ := newTestControl(t, ControlConfig{Secret: "s3", Throttle: NewThrottle(base, 8*base, nil)})
	h := c.Handler()
	var took []time.Duration
	for i := 0; i < 5; i++ {
		t0 := time.Now()
		require.Equal(t, http.StatusUnauthorized, post(h, "198.51.100.7:4000", ActionDisarm, "Bearer guess", `{"for":"1h"}`))
		took = append(took, time.Since(t0))
	}
	t.Logf("answer times of five wrong tokens in a row: %v", took)
	for i := 1; i < len(took); i++ {
		want := base << (i - 1)
		if want > 8*base {
			want = 8 * base
		}
		assert.GreaterOrEqual(t, took[i], want, "attempt %d", i+1)
	}

	// While the throttled address waits, another address goes straight through.
	done := make(chan int, 1)
	go func() { done <- post(h, "198.51.100.7:4001", ActionDisarm, "Bearer guess", `{"for":"1h"}`) }()
	time.Sleep(base / 4)
	t0 := time.Now()
	require.Equal(t, http.StatusOK, post(h, "203.0.113.9:4000", ActionDisarm, "Bearer s3", `{"for":"1h"}`))
	other := time.Since(t0)
	assert.Less(t, other, base, "another client must not wait behind the throttled one")
	assert.Equal(t, http.StatusUnauthorized, <-done)

	// A burst from the throttled address: the queue is bounded, the rest
	// are refused unjudged.
	codes := make(chan int, 8)
	for i := 0; i < 8; i++ {
		go func() { codes <- post(h, "198.51.100.7:4002", ActionDisarm, "Bearer guess", `{"for":"1h"}`) }()
	}
	n429 := 0
	for i := 0; i < 8; i++ {
		if <-codes == http.StatusTooManyRequests {
			n429++
		}
	}
	assert.GreaterOrEqual(t, n429, 6, "a burst of 8 must not all be judged")

	// The right token resets the address once it gets its turn.
	time.Sleep(9 * base)
	require.Equal(t, http.StatusOK, post(h, "198.51.100.7:4003", ActionArm, "Bearer s3", `{}`))
	t0 = time.Now()
	require.Equal(t, http.StatusOK, post(h, "198.51.100.7:4003", ActionArm, "Bearer s3", `{}`))
	assert.Less(t, time.Since(t0), base)
}
