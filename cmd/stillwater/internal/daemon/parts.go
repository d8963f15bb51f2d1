package daemon

import (
	"context"
	"errors"
	"fmt"
	"log/slog"
	"net"
	"net/http"
	"time"

	"stillwater/alert"
	"stillwater/cmd/stillwater/internal/config"
	"stillwater/cmd/stillwater/internal/watch"
)

// The daemon's long-running parts. Each Run blocks until its ctx ends (or
// its work is over) and returns once the goroutines it started have ended;
// Serve runs them in one group and stops them in order.

// cameraSet runs one goroutine per camera; a failing camera logs and ends
// alone.
type cameraSet struct {
	watches []*watch.Camera
	log     *slog.Logger
	// grace is how long a camera may take to stop after ctx ends; one
	// still running then (a call into the video backend that does not
	// return) is abandoned, not waited for, and onAbandon is called.
	grace     time.Duration
	onAbandon func(ids []string)
}

// Run returns when every camera has stopped: its source ended, or ctx
// ended and it stopped within grace (or was abandoned).
func (s cameraSet) Run(ctx context.Context) error {
	stopped := make([]chan struct{}, len(s.watches))
	for i, w := range s.watches {
		stopped[i] = make(chan struct{})
		go func() {
			defer close(stopped[i])
			if err := w.Run(ctx); err != nil {
				s.log.Error("camera stopped", "camera", w.Cam.ID, "err", err)
			}
		}()
	}
	if left := waitCameras(ctx, s.watches, stopped, s.grace); len(left) > 0 {
		if s.onAbandon != nil {
			s.onAbandon(left)
		}
		for _, id := range left {
			s.log.Error("camera did not stop; abandoned", "camera", id, "waited", s.grace)
		}
	}
	return nil
}

// heapTrimmer gives the free pages inside the C allocator's arenas back
// to the system every so often. Frames of many cameras are allocated and
// freed by OpenCV and FFmpeg on whichever thread runs them, and what is
// freed stays with the process unless given back: measured with eight
// cameras, the C heap in use held steady while its free space grew.
type heapTrimmer struct {
	every time.Duration
	trim  func() bool
}

func (h heapTrimmer) Run(ctx context.Context) error {
	t := time.NewTicker(h.every)
	defer t.Stop()
	for {
		select {
		case <-ctx.Done():
			return nil
		case <-t.C:
			h.trim()
		}
	}
}

// cHeapTrimEvery is how often the C heap's free pages are given back.
const cHeapTrimEvery = 15 * time.Second

// backlogRelay turns the outbox starting or ending a backlog into a fault
// on every camera. The publisher reports it from inside its publish path,
// so it is handed over on a channel rather than published from there.
type backlogRelay struct {
	events  <-chan backlogEvent
	watches []*watch.Camera
}

// Run relays until ctx ends.
func (b backlogRelay) Run(ctx context.Context) error {
	for {
		select {
		case <-ctx.Done():
			return nil
		case ev := <-b.events:
			detail := fmt.Sprintf("%d messages wait in the outbox, oldest from %s", ev.stats.Depth, ev.stats.Oldest.UTC().Format(time.RFC3339))
			for _, w := range b.watches {
				w.Raise(ctx, alert.FaultBusBacklog, ev.active, detail)
			}
		}
	}
}

// httpPart serves the daemon's HTTP listener.
type httpPart struct {
	srv *http.Server
	ln  net.Listener
}

// Run serves until ctx ends, then closes the server and its connections.
func (h httpPart) Run(ctx context.Context) error {
	done := make(chan struct{})
	defer close(done)
	go func() {
		select {
		case <-ctx.Done():
			h.srv.Close()
		case <-done:
		}
	}()
	if err := h.srv.Serve(h.ln); err != nil && !errors.Is(err, http.ErrServerClosed) {
		return fmt.Errorf("http: %w", err)
	}
	return nil
}

// Run applies each configuration from reload (SIGHUP's, already
// validated) between frames, until ctx ends. A nil reload waits for ctx.
func (r *reloader) Run(ctx context.Context, reload <-chan config.Config) error {
	for {
		select {
		case <-ctx.Done():
			return nil
		case next := <-reload:
			r.apply(next)
		}
	}
}
