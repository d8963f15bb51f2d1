package main

import (
	"time"

	"github.com/prometheus/client_golang/prometheus"
)

// metrics are the daemon's own collectors, registered on the registry
// that serve creates.
type metrics struct {
	frames    *prometheus.CounterVec
	procSecs  *prometheus.HistogramVec
	rejected  *prometheus.CounterVec
	tracks    *prometheus.GaugeVec
	published *prometheus.CounterVec
	pubErrors *prometheus.CounterVec
}

func newMetrics(reg prometheus.Registerer) *metrics {
	m := &metrics{
		frames: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "stillwater_frames_processed_total", Help: "Frames read and processed, by camera.",
		}, []string{"camera"}),
		procSecs: prometheus.NewHistogramVec(prometheus.HistogramOpts{
			Name: "stillwater_frame_processing_seconds", Help: "Time to read and process one frame, by camera.",
			Buckets: []float64{0.002, 0.005, 0.01, 0.02, 0.05, 0.1, 0.2, 0.5, 1},
		}, []string{"camera"}),
		rejected: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "stillwater_blobs_rejected_total", Help: "Foreground blobs dropped before tracking, by camera and reason.",
		}, []string{"camera", "reason"}),
		tracks: prometheus.NewGaugeVec(prometheus.GaugeOpts{
			Name: "stillwater_active_tracks", Help: "Tracks currently followed, by camera.",
		}, []string{"camera"}),
		published: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "stillwater_messages_published_total", Help: "Messages published, by camera and kind.",
		}, []string{"camera", "kind"}),
		pubErrors: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "stillwater_publish_errors_total", Help: "Publishes that failed, by camera.",
		}, []string{"camera"}),
	}
	reg.MustRegister(m.frames, m.procSecs, m.rejected, m.tracks, m.published, m.pubErrors)
	return m
}

// cameraMetrics is the per-camera view; a nil one records nothing.
type cameraMetrics struct {
	m  *metrics
	id string
}

func (m *metrics) camera(id string) *cameraMetrics { return &cameraMetrics{m: m, id: id} }

func (c *cameraMetrics) frame(d time.Duration) {
	if c == nil {
		return
	}
	c.m.frames.WithLabelValues(c.id).Inc()
	c.m.procSecs.WithLabelValues(c.id).Observe(d.Seconds())
}

func (c *cameraMetrics) rejected(reason string) {
	if c == nil {
		return
	}
	c.m.rejected.WithLabelValues(c.id, reason).Inc()
}

func (c *cameraMetrics) tracks(n int) {
	if c == nil {
		return
	}
	c.m.tracks.WithLabelValues(c.id).Set(float64(n))
}

func (c *cameraMetrics) published(kind string) {
	if c == nil {
		return
	}
	c.m.published.WithLabelValues(c.id, kind).Inc()
}

func (c *cameraMetrics) publishError() {
	if c == nil {
		return
	}
	c.m.pubErrors.WithLabelValues(c.id).Inc()
}
