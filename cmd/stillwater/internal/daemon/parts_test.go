package daemon

import (
	"context"
	"io"
	"net"
	"net/http"
	"sync/atomic"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"stillwater/cmd/stillwater/internal/config"
)

// Each part's Run ends when its context does, and only then: the stop
// sequence in Serve relies on that.
func TestPartsStopWithTheirContext(t *testing.T) {
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	require.NoError(t, err)
	mux := http.NewServeMux()
	mux.HandleFunc("/healthz", func(w http.ResponseWriter, _ *http.Request) { io.WriteString(w, "ok\n") })
	url := "http://" + ln.Addr().String() + "/healthz"
	reload := make(chan config.Config)
	var trims atomic.Int32
	parts := []struct {
		name  string
		run   func(context.Context) error
		alive func(t *testing.T)
		dead  func(t *testing.T)
	}{
		{
			name: "http",
			run:  httpPart{srv: &http.Server{Handler: mux, ReadHeaderTimeout: time.Second}, ln: ln}.Run,
			alive: func(t *testing.T) {
				resp, err := http.Get(url)
				require.NoError(t, err)
				resp.Body.Close()
				assert.Equal(t, http.StatusOK, resp.StatusCode)
			},
			dead: func(t *testing.T) {
				_, err := http.Get(url)
				assert.Error(t, err, "the listener is closed once Run has returned")
			},
		},
		{name: "backlog relay", run: backlogRelay{events: make(chan backlogEvent)}.Run},
		{name: "reloader", run: func(ctx context.Context) error { return (&reloader{}).Run(ctx, reload) }},
		{name: "no cameras", run: cameraSet{grace: time.Second}.Run},
		{
			name: "heap trimmer",
			run:  heapTrimmer{every: 5 * time.Millisecond, trim: func() bool { trims.Add(1); return true }}.Run,
			alive: func(t *testing.T) {
				assert.Positive(t, trims.Load(), "trimmed on its timer")
			},
			dead: func(t *testing.T) {
				n := trims.Load()
				time.Sleep(30 * time.Millisecond)
				assert.Equal(t, n, trims.Load(), "no trimming once Run has returned")
			},
		},
	}
	for _, p := range parts {
		t.Run(p.name, func(t *testing.T) {
			ctx, cancel := context.WithCancel(context.Background())
			done := make(chan error, 1)
			go func() { done <- p.run(ctx) }()
			if p.name != "no cameras" {
				select {
				case err := <-done:
					t.Fatalf("Run returned before its context ended: %v", err)
				case <-time.After(50 * time.Millisecond):
				}
			}
			if p.alive != nil {
				p.alive(t)
			}
			cancel()
			select {
			case err := <-done:
				assert.NoError(t, err)
			case <-time.After(5 * time.Second):
				t.Fatal("Run did not return after its context ended")
			}
			if p.dead != nil {
				p.dead(t)
			}
		})
	}
}
