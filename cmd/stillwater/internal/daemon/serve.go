// Package daemon runs the whole watch: the cameras, the bus, arming,
// HTTP (health, metrics, control, pictures) and configuration reloads, in
// one goroutine tree with a written shutdown order.
package daemon

import (
	"context"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"net"
	"net/http"
	"os"
	"runtime/debug"
	"sync/atomic"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/collectors"
	"github.com/prometheus/client_golang/prometheus/promhttp"
	"golang.org/x/sync/errgroup"

	"stillwater/alert"
	"stillwater/alert/arming"
	"stillwater/alert/bus"
	"stillwater/cmd/stillwater/internal/config"
	"stillwater/cmd/stillwater/internal/metrics"
	"stillwater/cmd/stillwater/internal/pipeline"
	"stillwater/cmd/stillwater/internal/redact"
	"stillwater/cmd/stillwater/internal/watch"
	"stillwater/vision"
)

// safetyNotice is logged at start-up and printed by the README.
const safetyNotice = "stillwater is a supplementary alarm layer. It does not replace adult supervision, pool fencing, " +
	"self-closing gates, covers or the alarms your local codes require; follow local codes and licensed installers."

// Deps are the daemon's outside dependencies, supplied by run or a test.
type Deps struct {
	Log *slog.Logger
	Now func() time.Time
	// Registry receives the daemon's metrics; nil makes a fresh one.
	Registry *prometheus.Registry
	// Ready, when set, receives the bus URL and HTTP address once both are up.
	Ready func(busURL, httpAddr string)
	// Reload delivers a new, validated configuration (on SIGHUP).
	// Calibration, zones, detection settings and schedules take effect
	// between frames; anything else needs a restart and is logged.
	Reload <-chan config.Config
	// ConfigFile is the file the configuration came from, LoadConfig
	// reads and validates it as a reload does, and Reread reloads it as
	// SIGHUP does: with all three the page may save a calibration.
	ConfigFile string
	LoadConfig func() (config.Config, error)
	Reread     func()
}

// Serve runs the daemon until ctx ends or every camera source has ended.
func Serve(ctx context.Context, cfg config.Config, d Deps) error {
	log := d.Log
	if log == nil {
		log = slog.New(slog.NewTextHandler(io.Discard, nil))
	}
	now := d.Now
	if now == nil {
		now = time.Now
	}
	log = redact.WithRedaction(log, cfg.Secrets()...)
	log.Warn(safetyNotice)
	if err := os.MkdirAll(cfg.DataDir, 0o750); err != nil {
		return fmt.Errorf("data_dir %s: %w", cfg.DataDir, err)
	}

	reg := d.Registry
	if reg == nil {
		reg = prometheus.NewRegistry()
	}
	reg.MustRegister(collectors.NewGoCollector(), collectors.NewProcessCollector(collectors.ProcessCollectorOpts{}))
	version := buildVersion()
	met := metrics.New(reg, version)
	log.Info("stillwater starting", "version", version, "cameras", len(cfg.Cameras), "opencv_threads", cfg.OpenCVThreads)
	// OpenCV's worker pool is the whole process's: sized once, before any
	// camera opens.
	if err := cfg.ApplyOpenCVThreads(); err != nil {
		return err
	}

	sch, err := cfg.Schedules()
	if err != nil {
		return err
	}
	ids := make([]string, len(cfg.Cameras))
	for i, c := range cfg.Cameras {
		ids[i] = c.ID
	}
	var watches []*watch.Camera
	backlog := make(chan backlogEvent, 64)
	bus, err := config.OpenBus(ctx, cfg, arming.Config{Cameras: ids, Schedules: sch, Log: log}, now, log, config.BusHooks{
		OnResult: met.BusResult,
		// The publisher calls this from inside its own publish path: hand
		// the fault to a goroutine rather than publish from here.
		OnBacklog: func(active bool, st bus.Stats) {
			select {
			case backlog <- backlogEvent{active: active, stats: st}:
			default:
				log.Error("bus backlog event dropped: too many queued", "active", active)
			}
		},
		OnRefused: func(via string) { met.Refused.WithLabelValues(via).Inc() },
	})
	if err != nil {
		return err
	}
	defer bus.Close()
	busURL, nc, pub := bus.URL, bus.Conn, bus.Pub
	if bus.Embedded != nil {
		busURL = bus.Embedded.URL()
	}
	metrics.RegisterBusMetrics(reg, bus, now)
	metrics.RegisterCHeap(reg, vision.CHeapStats)

	busOut := &BusSink{Pub: pub, Met: met}
	page := newPage(cfg, d, bus.Arming, now, log)
	bs := page.sink(redactSink{next: busOut, red: redact.Of(log)})
	for _, cam := range cfg.Cameras {
		id := cam.ID
		armed := func(t time.Time) bool { a, _ := bus.Arming.Armed(id, t); return a }
		watches = append(watches, watch.New(cam, bs, armed, now, log, met.Camera(cam.ID), time.Duration(cfg.HeartbeatEvery), version, watch.NewEvidenceSettings(cfg)))
	}
	acc, warn, err := accessOf(cfg, os.Getenv)
	if err != nil {
		return err
	}
	config.LogWarnings(log, warn)
	pictures := newPictureGate(cfg.HTTP.Listen)
	pictures.set(acc)
	if !pictures.open && acc.viewer == "" && acc.control == "" {
		log.Warn("camera pictures are refused: the HTTP listener is not loopback and no token is set; set http.viewer_secret_env or http.viewer_secret_file", "listen", cfg.HTTP.Listen)
	}
	mux := http.NewServeMux()
	mux.Handle("/metrics", promhttp.HandlerFor(reg, promhttp.HandlerOpts{}))
	mux.HandleFunc("/healthz", func(w http.ResponseWriter, _ *http.Request) { fmt.Fprintln(w, "ok") })
	mux.Handle("/control/", bus.Control.Handler())
	mux.Handle("GET /cameras/{id}/latest.jpg", pictures.wrap(watch.LatestHandler(watches)))
	page.watches = watches // built since
	page.ctl.set(acc.control)
	mux.Handle("/", page.handler(pictures, func() { met.Refused.WithLabelValues("http").Inc() }))
	mux.HandleFunc("/readyz", func(w http.ResponseWriter, _ *http.Request) {
		problems := append(readiness(now(), watches, nc.IsConnected()), bus.Problems(now())...)
		if len(problems) > 0 {
			w.WriteHeader(http.StatusServiceUnavailable)
			for _, p := range problems {
				fmt.Fprintln(w, p)
			}
			return
		}
		fmt.Fprintln(w, "ready")
	})
	ln, err := net.Listen("tcp", cfg.HTTP.Listen)
	if err != nil {
		return fmt.Errorf("http.listen %s: %w", cfg.HTTP.Listen, err)
	}
	hs := newHTTPServer(mux, DefaultHTTPTimeouts(), log)
	log.Info("http listening", "addr", ln.Addr().String())
	if d.Ready != nil {
		d.Ready(busURL, ln.Addr().String())
	}

	rl := newReloader(log, cfg, acc, reloadTargets{
		watches:      watches,
		setSchedules: func(sch map[string]*arming.Schedule) error { return bus.Arming.SetSchedules(nil, sch, now()) },
		setAccess: func(a access) error {
			pictures.set(a)
			page.ctl.set(a.control)
			return bus.Control.SetAuth(a.control, a.tokenName, a.trustNATS)
		},
		setMaxDisarm: func(d time.Duration) ([]string, error) { return bus.Arming.SetMaxDisarm(d, now()) },
	})

	// The daemon's parts run in one group. They stop in this order:
	//  1. capture: the cameras, when ctx ends or every source has ended,
	//     with the backlog relay and the reloader, which serve them;
	//  2. the publisher: the outbox gets FlushWait to reach the bus, then
	//     the bus side (outbox drain, control requests, armed changes)
	//     stops;
	//  3. HTTP, last, so /metrics and /readyz answer while the rest stops.
	// The bus side and HTTP run on contexts of their own, ended by the
	// stop sequence, not by ctx.
	busCtx, stopBus := context.WithCancel(context.WithoutCancel(ctx))
	defer stopBus()
	httpCtx, stopHTTP := context.WithCancel(context.WithoutCancel(ctx))
	defer stopHTTP()
	var g errgroup.Group

	// HTTP: metrics, health, readiness, control, camera pictures.
	g.Go(func() error { return httpPart{srv: hs, ln: ln}.Run(httpCtx) })

	// The bus side. A failure is logged; the cameras go on, their
	// messages waiting in the outbox.
	g.Go(func() error {
		if err := bus.Run(busCtx); err != nil {
			log.Error("bus", "err", err)
		}
		return nil
	})

	// Capture, and the ordered stop that follows it.
	g.Go(func() error {
		defer stopHTTP()
		capCtx, stopCapture := context.WithCancel(ctx)
		var helpers errgroup.Group
		// The outbox's backlog, raised as a fault on every camera.
		helpers.Go(func() error { return backlogRelay{events: backlog, watches: watches}.Run(capCtx) })
		// A new configuration on SIGHUP, applied between frames.
		helpers.Go(func() error { return rl.Run(capCtx, d.Reload) })
		// The C heap's free pages, given back while the cameras run.
		helpers.Go(func() error { return heapTrimmer{every: cHeapTrimEvery, trim: vision.TrimCHeap}.Run(capCtx) })
		// The cameras; an abandoned one can no longer publish.
		cameraSet{watches: watches, log: log, grace: CameraStopWait, onAbandon: func([]string) { busOut.stop() }}.Run(ctx)
		stopCapture()
		helpers.Wait()

		fctx, cancel := context.WithTimeout(context.Background(), FlushWait)
		defer cancel()
		if err := pub.Flush(fctx); err != nil {
			log.Error("flush bus; what is left stays in the outbox for the next start", "err", err, "depth", pub.Stats().Depth)
		}
		stopBus()
		return nil
	})
	return g.Wait()
}

// Shutdown bounds: after the context ends, cameras get cameraStopWait to
// stop, then the outbox gets flushWait to reach the bus. systemd's
// TimeoutStopSec (deploy/stillwater.service) must stay above the sum.
const (
	CameraStopWait = 3 * time.Second
	FlushWait      = 5 * time.Second
)

// waitCameras waits until every camera's goroutine has closed its channel
// in stopped, or, once ctx has ended, grace more at most. It returns the
// ids of the cameras still running then.
func waitCameras(ctx context.Context, watches []*watch.Camera, stopped []chan struct{}, grace time.Duration) []string {
	all := make(chan struct{})
	go func() {
		for _, ch := range stopped {
			<-ch
		}
		close(all)
	}()
	select {
	case <-all:
		return nil
	case <-ctx.Done():
	}
	t := time.NewTimer(grace)
	defer t.Stop()
	select {
	case <-all:
		return nil
	case <-t.C:
	}
	var left []string
	for i, ch := range stopped {
		select {
		case <-ch:
		default:
			left = append(left, watches[i].Cam.ID)
		}
	}
	return left
}

// readiness lists why the daemon is not ready: an armed camera without
// frames, or the bus unreachable. Empty means ready.
func readiness(now time.Time, watches []*watch.Camera, busUp bool) []string {
	var out []string
	if !busUp {
		out = append(out, "bus: not connected")
	}
	for _, w := range watches {
		if err := w.Ready(now); err != nil {
			out = append(out, err.Error())
		}
	}
	return out
}

// buildVersion is the module version, or the VCS revision of a
// development build.
func buildVersion() string {
	bi, ok := debug.ReadBuildInfo()
	if !ok {
		return "unknown"
	}
	if v := bi.Main.Version; v != "" && v != "(devel)" {
		return v
	}
	rev, dirty := "", false
	for _, s := range bi.Settings {
		switch s.Key {
		case "vcs.revision":
			rev = s.Value
		case "vcs.modified":
			dirty = s.Value == "true"
		}
	}
	if rev == "" {
		return "devel"
	}
	if len(rev) > 12 {
		rev = rev[:12]
	}
	if dirty {
		rev += "-dirty"
	}
	return "devel-" + rev
}

// backlogEvent is the outbox starting or ending a backlog.
type backlogEvent struct {
	active bool
	stats  bus.Stats
}

// BusSink hands messages to the publisher: targets, clears, faults and
// armed changes go to the stream (or the outbox while the bus is down);
// heartbeats are plain messages, dropped while disconnected.
type BusSink struct {
	Pub *bus.Publisher
	Met *metrics.Metrics
	// closed is set when serve stops with cameras abandoned: what they
	// send later goes nowhere, not into a closed publisher.
	closed atomic.Bool
}

// redactSink hides secrets in messages before they leave, as the log
// does: a fault's detail may quote an error that quotes a camera URL.
type redactSink struct {
	next pipeline.Sink
	red  *redact.Redactor
}

// Send hides secrets in m and passes it on.
func (r redactSink) Send(ctx context.Context, m pipeline.Message) error {
	m.Data = r.red.Bytes(m.Data)
	return r.next.Send(ctx, m)
}

var errDaemonStopped = errors.New("the daemon has stopped")

func (b *BusSink) stop() { b.closed.Store(true) }

// Send publishes m, or refuses once the daemon has stopped.
func (b *BusSink) Send(ctx context.Context, m pipeline.Message) error {
	if b.closed.Load() {
		return errDaemonStopped
	}
	if err := b.Pub.Publish(ctx, m.Camera, m.Kind, m.ID, m.Data); err != nil {
		if m.Kind == alert.KindBeat && errors.Is(err, bus.ErrNotConnected) {
			return nil
		}
		return err
	}
	if m.Kind == alert.KindBeat { // stream messages count when acknowledged (busResult)
		b.Met.Camera(m.Camera).Published(m.Kind)
	}
	return nil
}
