package arming

import (
	"context"
	"encoding/json"
	"net/http"
	"net/http/httptest"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// Control through its two transports: a real HTTP server and a real NATS
// server in this process.

func TestHTTPControlRefusals(t *testing.T) {
	var mu sync.Mutex
	refused := 0
	c, a := newTestControl(t, ControlConfig{Secret: "s3cret", OnRefused: func(via string) {
		mu.Lock()
		defer mu.Unlock()
		if via == "http" {
			refused++
		}
	}})
	srv := httptest.NewServer(c.Handler())
	defer srv.Close()
	do := func(method, path, auth, body string) (int, ControlReply) {
		req, err := http.NewRequest(method, srv.URL+path, strings.NewReader(body))
		require.NoError(t, err)
		if auth != "" {
			req.Header.Set("Authorization", auth)
		}
		res, err := http.DefaultClient.Do(req)
		require.NoError(t, err)
		defer res.Body.Close()
		var r ControlReply
		require.NoError(t, json.NewDecoder(res.Body).Decode(&r))
		return res.StatusCode, r
	}
	cases := []struct {
		name, method, path, auth, body string
		code                           int
		refused                        int // cumulative http refusals after the case
		armed                          bool
	}{
		{"no token", "POST", "/control/disarm", "", `{"for":"1h"}`, 401, 1, true},
		{"wrong token", "POST", "/control/disarm", "Bearer nope", `{"for":"1h"}`, 401, 2, true},
		{"token in body is not enough over http", "POST", "/control/disarm", "", `{"for":"1h","token":"s3cret"}`, 401, 3, true},
		{"unauthorised malformed", "POST", "/control/disarm", "", `{"for":`, 401, 4, true},
		{"malformed", "POST", "/control/disarm", "Bearer s3cret", `{"for":"forever"}`, 400, 4, true},
		{"unknown field", "POST", "/control/disarm", "Bearer s3cret", `{"for":"1h","camera":"north","why":"x"}`, 400, 4, true},
		{"unknown camera", "POST", "/control/disarm", "Bearer s3cret", `{"for":"1h","camera":"south"}`, 400, 4, true},
		{"too long", "POST", "/control/disarm", "Bearer s3cret", `{"for":"48h"}`, 400, 4, true},
		{"wrong method", "GET", "/control/disarm", "Bearer s3cret", ``, 405, 4, true},
		{"status without token", "GET", "/control/status", "", ``, 200, 4, true},
		{"clear without token", "POST", "/control/clear", "", ``, 401, 5, true},
		{"disarm", "POST", "/control/disarm", "Bearer s3cret", `{"camera":"north","until":"2026-12-02T13:30:00+01:00"}`, 200, 5, false},
		{"status", "GET", "/control/status", "", ``, 200, 5, false},
		{"arm", "POST", "/control/arm", "Bearer s3cret", `{"for":"2h"}`, 200, 5, true},
	}
	for _, tc := range cases {
		code, rep := do(tc.method, tc.path, tc.auth, tc.body)
		assert.Equal(t, tc.code, code, "%s: %+v", tc.name, rep)
		assert.Equal(t, tc.code == 200, rep.OK, tc.name)
		if tc.code != 200 {
			assert.NotEmpty(t, rep.Error, tc.name)
		}
		mu.Lock()
		assert.Equal(t, tc.refused, refused, tc.name)
		mu.Unlock()
		armed, _ := a.Armed("north", ctlNow)
		assert.Equal(t, tc.armed, armed, tc.name)
	}
}

// natsControl serves c on an in-process NATS server (no authentication)
// and returns a client connection.
func natsControl(t *testing.T, c *Control) *nats.Conn {
	t.Helper()
	srv, err := server.NewServer(&server.Options{Host: "127.0.0.1", Port: -1, NoSigs: true, NoLog: true})
	require.NoError(t, err)
	srv.Start()
	require.True(t, srv.ReadyForConnections(10*time.Second))
	t.Cleanup(srv.Shutdown)
	dn, err := nats.Connect(srv.ClientURL())
	require.NoError(t, err)
	t.Cleanup(dn.Close)
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- c.Serve(ctx, dn) }()
	t.Cleanup(func() { cancel(); assert.NoError(t, <-done) })
	require.NoError(t, dn.Flush())
	nc, err := nats.Connect(srv.ClientURL())
	require.NoError(t, err)
	t.Cleanup(nc.Close)
	return nc
}

// requestMsg sends m and decodes the reply.
func requestMsg(t *testing.T, nc *nats.Conn, m *nats.Msg) ControlReply {
	t.Helper()
	res, err := nc.RequestMsg(m, 5*time.Second)
	require.NoError(t, err)
	var rep ControlReply
	require.NoError(t, json.Unmarshal(res.Data, &rep))
	return rep
}

// Over NATS the token may come in the body or in an Authorization
// header; a wrong one is refused and changes nothing.
func TestControlServeOverNATS(t *testing.T) {
	c, a := newTestControl(t, ControlConfig{Secret: "s3cret", TokenName: "owner", Throttle: NewThrottle(time.Millisecond, 2*time.Millisecond, nil)})
	nc := natsControl(t, c)
	armed := func() bool { ok, _ := a.Armed("north", ctlNow); return ok }

	rep := requestMsg(t, nc, &nats.Msg{Subject: "sw.control.disarm", Data: []byte(`{"for":"1h","token":"wrong"}`)})
	assert.False(t, rep.OK)
	assert.Contains(t, rep.Error, "refused")
	assert.True(t, armed(), "a refused request changes nothing")

	time.Sleep(5 * time.Millisecond) // let the throttle's delay pass
	rep = requestMsg(t, nc, &nats.Msg{Subject: "sw.control.disarm", Data: []byte(`{"for":"1h","token":"s3cret","by":"mallory"}`)})
	require.True(t, rep.OK, rep.Error)
	assert.False(t, armed())
	assert.Equal(t, "nats:owner", rep.Status.Cameras[0].Override.By, "the author is who the token stands for, not the body's by")

	m := nats.NewMsg("sw.control.arm")
	m.Header.Set("Authorization", "Bearer s3cret")
	rep = requestMsg(t, nc, m)
	require.True(t, rep.OK, rep.Error)
	assert.True(t, armed(), "the token in a header works too")

	rep = requestMsg(t, nc, &nats.Msg{Subject: "sw.control.status"})
	require.True(t, rep.OK, rep.Error)
	require.Len(t, rep.Status.Cameras, 1)
}
