package daemon

import (
	"context"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"

	"stillwater/cmd/stillwater/internal/config"
	"stillwater/cmd/stillwater/internal/watch"
)

// TestWaitCameras: serve waits for every camera while its context lives;
// once it has ended, a camera that does not stop within the grace (one
// stuck in a call into the video backend) is named and left behind.
func TestWaitCameras(t *testing.T) {
	watches := []*watch.Camera{{Cam: config.CameraConfig{ID: "quick"}}, {Cam: config.CameraConfig{ID: "stuck"}}}
	tests := []struct {
		name      string
		cancel    bool
		stopStuck bool
		want      []string
	}{
		{"all stop on their own", false, true, nil},
		{"all stop after cancel", true, true, nil},
		{"one stuck after cancel", true, false, []string{"stuck"}},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			ctx, cancel := context.WithCancel(context.Background())
			defer cancel()
			stopped := []chan struct{}{make(chan struct{}), make(chan struct{})}
			close(stopped[0])
			if tc.cancel {
				cancel()
			}
			if tc.stopStuck {
				go func() { time.Sleep(10 * time.Millisecond); close(stopped[1]) }()
			}
			got := waitCameras(ctx, watches, stopped, 200*time.Millisecond)
			assert.Equal(t, tc.want, got)
		})
	}
}
