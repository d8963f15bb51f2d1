package main

import (
	"context"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"net"
	"net/http"
	"os"
	"path/filepath"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/collectors"
	"github.com/prometheus/client_golang/prometheus/promhttp"
	"golang.org/x/sync/errgroup"

	"stillwater/alert"
)

// safetyNotice is logged at start-up and printed by the README.
const safetyNotice = "stillwater is a supplementary alarm layer. It does not replace adult supervision, pool fencing, " +
	"self-closing gates, covers or the alarms your local codes require; follow local codes and licensed installers."

// deps are the daemon's outside dependencies, supplied by run or a test.
type deps struct {
	Log *slog.Logger
	Now func() time.Time
	// Registry receives the daemon's metrics; nil makes a fresh one.
	Registry *prometheus.Registry
	// Ready, when set, receives the bus URL and HTTP address once both are up.
	Ready func(busURL, httpAddr string)
}

// serve runs the daemon until ctx ends or every camera source has ended.
func serve(ctx context.Context, cfg Config, d deps) error {
	log := d.Log
	if log == nil {
		log = slog.New(slog.NewTextHandler(io.Discard, nil))
	}
	now := d.Now
	if now == nil {
		now = time.Now
	}
	log.Warn(safetyNotice)
	if err := os.MkdirAll(cfg.DataDir, 0o750); err != nil {
		return fmt.Errorf("data_dir %s: %w", cfg.DataDir, err)
	}

	busURL := cfg.Bus.URL
	var emb *alert.Embedded
	if busURL == "" {
		var err error
		emb, err = alert.StartEmbedded(alert.EmbeddedConfig{Listen: cfg.Bus.Listen, StoreDir: filepath.Join(cfg.DataDir, "jetstream"), MQTT: cfg.Bus.MQTT})
		if err != nil {
			return err
		}
		defer emb.Shutdown()
		busURL = emb.URL()
		log.Info("embedded bus started", "url", busURL)
	}
	nc, err := nats.Connect(busURL, nats.Name("stillwater"), nats.MaxReconnects(-1), nats.ReconnectWait(500*time.Millisecond))
	if err != nil {
		return fmt.Errorf("connect bus %s: %w", busURL, err)
	}
	defer nc.Close()
	pub, err := alert.NewPublisher(ctx, nc, cfg.Bus.Prefix, alert.StreamConfig{})
	if err != nil {
		return err
	}

	reg := d.Registry
	if reg == nil {
		reg = prometheus.NewRegistry()
	}
	reg.MustRegister(collectors.NewGoCollector(), collectors.NewProcessCollector(collectors.ProcessCollectorOpts{}))
	met := newMetrics(reg)

	mux := http.NewServeMux()
	mux.Handle("/metrics", promhttp.HandlerFor(reg, promhttp.HandlerOpts{}))
	mux.HandleFunc("/healthz", func(w http.ResponseWriter, _ *http.Request) { fmt.Fprintln(w, "ok") })
	ln, err := net.Listen("tcp", cfg.HTTP.Listen)
	if err != nil {
		return fmt.Errorf("http.listen %s: %w", cfg.HTTP.Listen, err)
	}
	hs := &http.Server{Handler: mux, ReadHeaderTimeout: 5 * time.Second}
	log.Info("http listening", "addr", ln.Addr().String())
	if d.Ready != nil {
		d.Ready(busURL, ln.Addr().String())
	}

	// Shutdown order: cameras stop first (their context ends or their file
	// ends), then the bus is flushed, then HTTP closes.
	httpCtx, stopHTTP := context.WithCancel(context.Background())
	defer stopHTTP()
	httpDone := make(chan error, 1)
	go func() {
		go func() { <-httpCtx.Done(); hs.Close() }()
		if err := hs.Serve(ln); err != nil && !errors.Is(err, http.ErrServerClosed) {
			httpDone <- err
			return
		}
		httpDone <- nil
	}()

	g, gctx := errgroup.WithContext(ctx)
	bs := &busSink{pub: pub, met: met}
	for _, cam := range cfg.Cameras {
		cam := cam
		// One goroutine per camera; a failing camera logs and ends alone.
		g.Go(func() error {
			err := watchCamera(gctx, cam, bs, func() bool { return true }, now, log, met.camera(cam.ID))
			if err != nil {
				log.Error("camera stopped", "camera", cam.ID, "err", err)
			}
			return nil
		})
	}
	g.Wait()

	fctx, cancel := context.WithTimeout(context.Background(), 5*time.Second)
	defer cancel()
	if err := pub.Flush(fctx); err != nil {
		log.Error("flush bus", "err", err)
	}
	stopHTTP()
	return <-httpDone
}

// busSink publishes to the bus and counts.
type busSink struct {
	pub *alert.Publisher
	met *metrics
}

func (b *busSink) send(ctx context.Context, m outMsg) error {
	pctx, cancel := context.WithTimeout(ctx, 5*time.Second)
	defer cancel()
	if err := b.pub.Publish(pctx, m.Camera, m.Kind, m.ID, m.Data); err != nil {
		return err
	}
	b.met.camera(m.Camera).published(m.Kind)
	return nil
}
