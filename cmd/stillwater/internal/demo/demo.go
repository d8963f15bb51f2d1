// Package demo runs the daemon on a generated clip with an in-process
// bus and collects what a subscriber receives, against the clip's labels.
package demo

import (
	"context"
	"encoding/json"
	"fmt"
	"io"
	"log/slog"
	"math"
	"path/filepath"
	"sort"
	"sync"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/prometheus/client_golang/prometheus"

	"stillwater/alert"
	"stillwater/cmd/stillwater/internal/config"
	"stillwater/cmd/stillwater/internal/daemon"
	"stillwater/vision/synth"
)

// Result summarises a demo run against the clip's ground truth.
type Result struct {
	Frames      int
	Elapsed     time.Duration
	Targets     []alert.Target
	Entry       float64 // s, first presence; NaN when the clip is empty
	FirstAlert  float64 // s of media time, NaN when none
	Errors      []float64
	ClearedSeen int
	Faults      []alert.Fault
}

// Delay is the first alert's delay after the entry, seconds of media
// time; NaN without either.
func (r Result) Delay() float64 { return r.FirstAlert - r.Entry }

// Print writes the summary an installer reads.
func (r Result) Print(w io.Writer) {
	fps := float64(r.Frames) / r.Elapsed.Seconds()
	fmt.Fprintf(w, "\nsummary: %d frames in %.1f s (%.0f frames/s), %d target messages, %d cleared\n", r.Frames, r.Elapsed.Seconds(), fps, len(r.Targets), r.ClearedSeen)
	switch {
	case math.IsNaN(r.Entry):
		fmt.Fprintln(w, "ground truth: empty pool")
	case math.IsNaN(r.FirstAlert):
		fmt.Fprintf(w, "ground truth: intruder enters at %.1f s; NO ALERT\n", r.Entry)
	default:
		fmt.Fprintf(w, "ground truth: intruder enters at %.1f s; first alert at %.1f s (delay %.2f s)\n", r.Entry, r.FirstAlert, r.Delay())
	}
	if len(r.Errors) > 0 {
		e := append([]float64(nil), r.Errors...)
		sort.Float64s(e)
		fmt.Fprintf(w, "position error against ground truth: median %.3f m, max %.3f m over %d targets\n", e[len(e)/2], e[len(e)-1], len(e))
	}
}

// Run renders the scene into dir, runs serve over it with an embedded bus
// and collects what a subscriber receives.
func Run(ctx context.Context, s synth.Scene, dir string, realtime bool, log *slog.Logger, out io.Writer) (Result, error) {
	clip := filepath.Join(dir, "demo.avi")
	fmt.Fprintf(out, "rendering a %.0f s synthetic clip to %s ...\n", s.Duration, clip)
	truth, err := synth.Render(ctx, s, clip, filepath.Join(dir, "demo.json"))
	if err != nil {
		return Result{Entry: math.NaN(), FirstAlert: math.NaN()}, err
	}
	return Clip(ctx, truth, clip, dir, realtime, log, out)
}

// Clip runs serve over a rendered clip (its labels in truth), with the
// daemon's data in dir, and collects what a subscriber receives. Frames is
// what the daemon counted as processed, not the clip's length.
func Clip(ctx context.Context, truth synth.Truth, clip, dir string, realtime bool, log *slog.Logger, out io.Writer) (Result, error) {
	res := Result{Entry: math.NaN(), FirstAlert: math.NaN()}
	var err error
	if len(truth.Presence) > 0 {
		res.Entry = truth.Presence[0].From
	}
	cfg := Config(truth, clip, dir, realtime)

	var mu sync.Mutex
	var sub *nats.Subscription
	var nc *nats.Conn
	ready := func(busURL, httpAddr string) {
		fmt.Fprintf(out, "bus %s, metrics http://%s/metrics\n", busURL, httpAddr)
		c, err := nats.Connect(busURL)
		if err != nil {
			log.Error("demo subscriber", "err", err)
			return
		}
		nc = c
		sub, _ = nc.Subscribe(cfg.Bus.Prefix+".*.>", func(m *nats.Msg) {
			var k struct {
				Kind string `json:"kind"`
			}
			if json.Unmarshal(m.Data, &k) != nil {
				return
			}
			mu.Lock()
			defer mu.Unlock()
			switch k.Kind {
			case alert.KindTarget:
				var t alert.Target
				if json.Unmarshal(m.Data, &t) != nil {
					return
				}
				res.Targets = append(res.Targets, t)
				fmt.Fprintf(out, "%s  target  camera=%s track=%d %-6s x=%.2f m y=%.2f m area=%.3f m² dwell=%.1f s\n",
					t.FrameTime.Format("15:04:05.0"), t.Camera, t.Track, t.Event, t.Surface.X, t.Surface.Y, t.Area, t.Dwell)
			case alert.KindCleared:
				var c alert.Cleared
				if json.Unmarshal(m.Data, &c) != nil {
					return
				}
				res.ClearedSeen++
				fmt.Fprintf(out, "%s  cleared camera=%s track=%d after %.1f s\n", c.FrameTime.Format("15:04:05.0"), c.Camera, c.Track, c.Duration)
			case alert.KindFault:
				var f alert.Fault
				if json.Unmarshal(m.Data, &f) != nil {
					return
				}
				res.Faults = append(res.Faults, f)
				fmt.Fprintf(out, "%s  fault   camera=%s %s active=%v: %s\n", f.Time.Format("15:04:05.0"), f.Camera, f.Fault, f.Active, f.Message)
			}
		})
	}
	start := time.Now()
	reg := prometheus.NewRegistry()
	err = daemon.Serve(ctx, cfg, daemon.Deps{Log: log, Ready: ready, Registry: reg})
	res.Elapsed = time.Since(start)
	if nc != nil {
		nc.Flush()
		time.Sleep(100 * time.Millisecond)
		if sub != nil {
			sub.Unsubscribe()
		}
		nc.Close()
	}
	if err != nil {
		return res, err
	}
	if res.Frames, err = framesProcessed(reg, cfg.Cameras[0].ID); err != nil {
		return res, err
	}
	mu.Lock()
	defer mu.Unlock()
	for _, t := range res.Targets {
		mt := float64(t.Frame) / truth.FPS
		if math.IsNaN(res.FirstAlert) || mt < res.FirstAlert {
			res.FirstAlert = mt
		}
		if t.Frame < len(truth.PerFrame) {
			if in := truth.PerFrame[t.Frame].Intruder; in != nil {
				res.Errors = append(res.Errors, math.Hypot(t.Surface.X-in.X, t.Surface.Y-in.Y))
			}
		}
	}
	return res, nil
}

// Config is the daemon configuration for a rendered clip: its corners
// from the labels, the embedded bus on a free loopback port, metrics on a
// free loopback port.
func Config(t synth.Truth, clip, dir string, realtime bool) config.Config {
	cfg := config.Defaults()
	cfg.DataDir = filepath.Join(dir, "data")
	cfg.HTTP.Listen = "127.0.0.1:0"
	cfg.Bus.Listen = "127.0.0.1:-1"
	cam := config.CameraConfig{
		ID: "demo", Source: clip, Realtime: realtime,
		CalibrationConfig: config.CalibrationConfig{
			Pool:           config.PoolConfig{Length: t.Pool.Length, Width: t.Pool.Width},
			CameraPosition: &config.CameraPositionConfig{X: t.Camera.X, Y: t.Camera.Y, Height: t.Camera.Height},
		},
		Detect:       config.DefaultDetect(),
		FrameTimeout: config.Duration(config.DefaultFrameTimeout),
	}
	for _, c := range t.Corners {
		cam.Corners = append(cam.Corners, c.Pixel)
	}
	cfg.Cameras = []config.CameraConfig{cam}
	return cfg
}

// framesProcessed reads stillwater_frames_processed_total of a camera from
// the daemon's registry.
func framesProcessed(reg prometheus.Gatherer, camera string) (int, error) {
	mfs, err := reg.Gather()
	if err != nil {
		return 0, fmt.Errorf("gather metrics: %w", err)
	}
	for _, mf := range mfs {
		if mf.GetName() != "stillwater_frames_processed_total" {
			continue
		}
		for _, m := range mf.GetMetric() {
			for _, l := range m.GetLabel() {
				if l.GetName() == "camera" && l.GetValue() == camera {
					return int(m.GetCounter().GetValue()), nil
				}
			}
		}
	}
	return 0, nil
}
