package daemon

import (
	"net/http"
	"net/http/httptest"
	"testing"

	"github.com/stretchr/testify/assert"
)

func TestLoopbackListen(t *testing.T) {
	for addr, want := range map[string]bool{
		"127.0.0.1:9310": true, "127.0.0.2:1": true, "[::1]:9310": true, "localhost:9310": true,
		":9310": false, "0.0.0.0:9310": false, "[::]:9310": false, "192.168.1.5:9310": false, "pool.lan:9310": false, "garbage": false,
	} {
		assert.Equal(t, want, LoopbackListen(addr), addr)
	}
}

// Pictures on a listener that is not loopback: refused outright without
// any token configured, otherwise opened by either token.
func TestPictureGate(t *testing.T) {
	ok := http.HandlerFunc(func(w http.ResponseWriter, _ *http.Request) { w.WriteHeader(http.StatusOK) })
	get := func(h http.Handler, tok string) int {
		req := httptest.NewRequest("GET", "/cameras/pool/latest.jpg", nil)
		if tok != "" {
			req.Header.Set("Authorization", "Bearer "+tok)
		}
		w := httptest.NewRecorder()
		h.ServeHTTP(w, req)
		return w.Code
	}
	open := newPictureGate("127.0.0.1:9310")
	assert.Equal(t, http.StatusOK, get(open.wrap(ok), ""), "loopback: open")

	g := newPictureGate("0.0.0.0:9310")
	h := g.wrap(ok)
	assert.Equal(t, http.StatusForbidden, get(h, ""), "no token configured: refused")
	g.set(access{viewer: "v", control: "c"})
	assert.Equal(t, http.StatusUnauthorized, get(h, ""))
	for _, tok := range []string{"v", "c"} {
		g.throttle.Accepted("192.0.2.1") // httptest's client address
		assert.Equal(t, http.StatusOK, get(h, tok), tok)
	}
	g.set(access{viewer: "v2"})
	g.throttle.Accepted("192.0.2.1")
	assert.Equal(t, http.StatusUnauthorized, get(h, "c"), "the control token is gone")
}
