package alert

import (
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
	rep := c.handleNATS(&nats.Msg{Subject: "sw.control.disarm", Data: []byte(`{"for":"1h","token":""}`)})
	assert.False(t, rep.OK)
	assert.Equal(t, 4, refused)
	rep = c.handleNATS(&nats.Msg{Subject: "sw.control.status"})
	assert.True(t, rep.OK, rep.Error)
}
