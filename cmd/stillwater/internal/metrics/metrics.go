// Package metrics is the daemon's own Prometheus series: per camera
// frames, stages, rejections, faults and alarms, and the bus side.
package metrics

import (
	"runtime"
	"time"

	"github.com/prometheus/client_golang/prometheus"

	"stillwater/alert/bus"
	"stillwater/cmd/stillwater/internal/config"
	"stillwater/vision"
)

// Metrics are the daemon's own collectors, registered on the registry
// that serve creates. Names follow Prometheus conventions: a unit suffix,
// _total on counters, one "camera" label.
type Metrics struct {
	read        *prometheus.CounterVec
	processed   *prometheus.CounterVec
	dropped     *prometheus.CounterVec
	frameAgeG   *prometheus.GaugeVec
	recUp       *prometheus.GaugeVec
	recExits    *prometheus.CounterVec
	decodeErrs  *prometheus.CounterVec
	procSecs    *prometheus.HistogramVec
	stageSecs   *prometheus.HistogramVec
	rejected    *prometheus.CounterVec
	tracks      *prometheus.GaugeVec
	up          *prometheus.GaugeVec
	reconnects  *prometheus.CounterVec
	armed       *prometheus.GaugeVec
	alarms      *prometheus.CounterVec
	faults      *prometheus.CounterVec
	faultActive *prometheus.GaugeVec
	beatTime    *prometheus.GaugeVec
	published   *prometheus.CounterVec
	acked       *prometheus.CounterVec
	pubErrors   *prometheus.CounterVec
	pubSecs     *prometheus.HistogramVec
	Refused     *prometheus.CounterVec
	build       *prometheus.GaugeVec
}

// New registers the daemon's collectors on reg; version labels
// stillwater_build_info.
func New(reg prometheus.Registerer, version string) *Metrics {
	cam := []string{"camera"}
	counter := func(name, help string, labels ...string) *prometheus.CounterVec {
		return prometheus.NewCounterVec(prometheus.CounterOpts{Name: name, Help: help}, labels)
	}
	gauge := func(name, help string, labels ...string) *prometheus.GaugeVec {
		return prometheus.NewGaugeVec(prometheus.GaugeOpts{Name: name, Help: help}, labels)
	}
	secs := []float64{0.001, 0.002, 0.005, 0.01, 0.02, 0.05, 0.1, 0.2, 0.5, 1, 2, 5}
	m := &Metrics{
		read:       counter("stillwater_frames_read_total", "Frames read from the camera.", cam...),
		processed:  counter("stillwater_frames_processed_total", "Frames that went through the whole pipeline.", cam...),
		dropped:    counter("stillwater_frames_dropped_total", "Frames of a live camera (or a file played in real time) dropped unsearched to catch up with the stream.", cam...),
		frameAgeG:  gauge("stillwater_frame_age_seconds", "Age of the latest processed frame when its processing ended: from when the camera took it (a file played in real time: when it was due) to its messages handed to the bus.", cam...),
		decodeErrs: counter("stillwater_decode_errors_total", "Reads that returned no decodable frame.", cam...),
		recUp:      gauge("stillwater_evidence_recorder_up", "1 while the camera's evidence stream is being copied into its pre-roll ring.", cam...),
		recExits:   counter("stillwater_evidence_recorder_exits_total", "Times the evidence stream's copying process ended and had to be started again.", cam...),
		procSecs: prometheus.NewHistogramVec(prometheus.HistogramOpts{
			Name: "stillwater_frame_processing_seconds", Help: "Time to read and process one frame.", Buckets: secs,
		}, cam),
		stageSecs: prometheus.NewHistogramVec(prometheus.HistogramOpts{
			Name: "stillwater_stage_seconds", Help: "Time spent per frame in each stage: vision (read and detect), track, publish.", Buckets: secs,
		}, []string{"camera", "stage"}),
		rejected:    counter("stillwater_blobs_rejected_total", "Foreground blobs dropped before tracking, by reason.", "camera", "reason"),
		tracks:      gauge("stillwater_active_tracks", "Tracks currently followed.", cam...),
		up:          gauge("stillwater_camera_up", "1 while frames arrive within the frame timeout.", cam...),
		reconnects:  counter("stillwater_camera_reconnects_total", "Times the camera was opened again after a failure.", cam...),
		armed:       gauge("stillwater_armed", "1 while the camera's pool is armed.", cam...),
		alarms:      counter("stillwater_alarms_total", "Alarms raised (target start events).", cam...),
		faults:      counter("stillwater_faults_total", "Faults raised, by kind.", "camera", "fault"),
		faultActive: gauge("stillwater_fault_active", "1 while a fault of the kind is active.", "camera", "fault"),
		beatTime:    gauge("stillwater_heartbeat_timestamp_seconds", "Unix time of the last heartbeat sent.", cam...),
		published:   counter("stillwater_messages_published_total", "Messages the bus took, by kind: stream messages acknowledged and heartbeats sent.", "camera", "kind"),
		acked:       counter("stillwater_messages_acknowledged_total", "Stream messages the server acknowledged, directly or from the outbox, by kind.", "camera", "kind"),
		pubErrors:   counter("stillwater_publish_errors_total", "Publishes that failed.", cam...),
		pubSecs: prometheus.NewHistogramVec(prometheus.HistogramOpts{
			Name: "stillwater_publish_seconds", Help: "Time from handing a stream message to the bus to its acknowledgement, outbox time included, by kind.", Buckets: secs,
		}, []string{"kind"}),
		Refused: counter("stillwater_control_refused_total", "Control requests refused, by channel.", "via"),
		build:   gauge("stillwater_build_info", "Always 1; labels carry the version.", "version", "goversion"),
	}
	reg.MustRegister(m.read, m.processed, m.dropped, m.frameAgeG, m.recUp, m.recExits, m.decodeErrs, m.procSecs, m.stageSecs, m.rejected, m.tracks,
		m.up, m.reconnects, m.armed, m.alarms, m.faults, m.faultActive, m.beatTime, m.published, m.acked, m.pubErrors, m.pubSecs,
		m.Refused, m.build)
	m.build.WithLabelValues(version, runtime.Version()).Set(1)
	return m
}

// Camera is the per-camera view; a nil one records nothing, so
// replays and tests can run the pipeline without a registry.
type Camera struct {
	m  *Metrics
	id string
}

// Camera returns the recorder of one camera's series.
func (m *Metrics) Camera(id string) *Camera { return &Camera{m: m, id: id} }

// Frame counts a frame read from the camera.
func (c *Camera) Frame() {
	if c == nil {
		return
	}
	c.m.read.WithLabelValues(c.id).Inc()
}

// Processed counts a frame through the pipeline and observes its
// processing time.
func (c *Camera) Processed(d time.Duration) {
	if c == nil {
		return
	}
	c.m.processed.WithLabelValues(c.id).Inc()
	c.m.procSecs.WithLabelValues(c.id).Observe(d.Seconds())
}

// Stage observes the time one stage (vision, track, ...) took.
func (c *Camera) Stage(name string, d time.Duration) {
	if c == nil {
		return
	}
	c.m.stageSecs.WithLabelValues(c.id, name).Observe(d.Seconds())
}

// Rejected counts a candidate rejected for reason.
func (c *Camera) Rejected(reason string) {
	if c == nil {
		return
	}
	c.m.rejected.WithLabelValues(c.id, reason).Inc()
}

// Tracks sets the number of live tracks.
func (c *Camera) Tracks(n int) {
	if c == nil {
		return
	}
	c.m.tracks.WithLabelValues(c.id).Set(float64(n))
}

// CameraUp sets whether the camera delivers frames.
func (c *Camera) CameraUp(up bool) {
	if c == nil {
		return
	}
	c.m.up.WithLabelValues(c.id).Set(b2f(up))
}

// ArmedState sets whether the camera's pool is armed.
func (c *Camera) ArmedState(armed bool) {
	if c == nil {
		return
	}
	c.m.armed.WithLabelValues(c.id).Set(b2f(armed))
}

// Reconnect counts a reconnection attempt.
func (c *Camera) Reconnect() {
	if c == nil {
		return
	}
	c.m.reconnects.WithLabelValues(c.id).Inc()
}

// DroppedFrames counts n frames dropped to keep up.
func (c *Camera) DroppedFrames(n int) {
	if c == nil || n <= 0 {
		return
	}
	c.m.dropped.WithLabelValues(c.id).Add(float64(n))
}

// FrameAge observes how old a frame was when processed.
func (c *Camera) FrameAge(d time.Duration) {
	if c == nil {
		return
	}
	c.m.frameAgeG.WithLabelValues(c.id).Set(d.Seconds())
}

// Recorder records the evidence stream's recorder starting to write (up)
// or its process ending.
func (c *Camera) Recorder(up bool) {
	if c == nil {
		return
	}
	c.m.recUp.WithLabelValues(c.id).Set(b2f(up))
	if !up {
		c.m.recExits.WithLabelValues(c.id).Inc()
	}
}

// DecodeErrors counts n undecodable frames.
func (c *Camera) DecodeErrors(n int) {
	if c == nil || n <= 0 {
		return
	}
	c.m.decodeErrs.WithLabelValues(c.id).Add(float64(n))
}

// Alarm counts an alarm raised.
func (c *Camera) Alarm() {
	if c == nil {
		return
	}
	c.m.alarms.WithLabelValues(c.id).Inc()
}

// Fault sets whether a fault of kind is active.
func (c *Camera) Fault(kind string, active bool) {
	if c == nil {
		return
	}
	if active {
		c.m.faults.WithLabelValues(c.id, kind).Inc()
	}
	c.m.faultActive.WithLabelValues(c.id, kind).Set(b2f(active))
}

// Heartbeat records the time of the last heartbeat.
func (c *Camera) Heartbeat(t time.Time) {
	if c == nil {
		return
	}
	c.m.beatTime.WithLabelValues(c.id).Set(float64(t.UnixNano()) / 1e9)
}

// Published counts a plain message (a heartbeat) sent; stream messages
// are counted when acknowledged, by busResult.
func (c *Camera) Published(kind string) {
	if c == nil {
		return
	}
	c.m.published.WithLabelValues(c.id, kind).Inc()
}

// PublishError counts a message that could not be published.
func (c *Camera) PublishError() {
	if c == nil {
		return
	}
	c.m.pubErrors.WithLabelValues(c.id).Inc()
}

func b2f(b bool) float64 {
	if b {
		return 1
	}
	return 0
}

// BusResult records the fate of one message, from the publisher's
// OnResult callback: an acknowledged stream message is counted as
// published and acknowledged, and its time from Publish to the
// acknowledgement observed, once.
func (m *Metrics) BusResult(r bus.PublishResult) {
	if r.Err != nil {
		return
	}
	m.published.WithLabelValues(r.Camera, r.Kind).Inc()
	m.acked.WithLabelValues(r.Camera, r.Kind).Inc()
	m.pubSecs.WithLabelValues(r.Kind).Observe(r.Latency.Seconds())
}

// RegisterBusMetrics registers the series read from the bus side at
// scrape time.
func RegisterBusMetrics(reg prometheus.Registerer, b *config.BusParts, now func() time.Time) {
	pub := b.Pub
	stats := func(f func(bus.Stats) float64) func() float64 { return func() float64 { return f(pub.Stats()) } }
	fault := func(reason, help string, active func() bool) prometheus.Collector {
		return prometheus.NewGaugeFunc(prometheus.GaugeOpts{Name: "stillwater_bus_fault", Help: help, ConstLabels: prometheus.Labels{"reason": reason}},
			func() float64 { return b2f(active()) })
	}
	const faultHelp = "1 while the bus side has a fault of the reason: stream (the stream cannot be created or used), stalled (the oldest queued message is over 30 s old)."
	reg.MustRegister(
		prometheus.NewGaugeFunc(prometheus.GaugeOpts{Name: "stillwater_outbox_depth", Help: "Messages waiting in the outbox for the bus."},
			stats(func(s bus.Stats) float64 { return float64(s.Depth) })),
		prometheus.NewGaugeFunc(prometheus.GaugeOpts{Name: "stillwater_outbox_oldest_age_seconds", Help: "Age of the oldest message in the outbox; 0 when it is empty."},
			func() float64 { age, _ := b.Stalled(now()); return age.Seconds() }),
		prometheus.NewCounterFunc(prometheus.CounterOpts{Name: "stillwater_outbox_dropped_total", Help: "Messages the outbox dropped or refused because it was full."},
			stats(func(s bus.Stats) float64 { return float64(s.Dropped + s.Refused) })),
		prometheus.NewCounterFunc(prometheus.CounterOpts{Name: "stillwater_messages_queued_total", Help: "Stream messages put in the outbox to wait for the bus."},
			stats(func(s bus.Stats) float64 { return float64(s.Queued) })),
		prometheus.NewCounterFunc(prometheus.CounterOpts{Name: "stillwater_messages_dead_lettered_total", Help: "Messages the server refused or never acknowledged, moved to the dead-letter file."},
			stats(func(s bus.Stats) float64 { return float64(s.DeadLettered) })),
		prometheus.NewCounterFunc(prometheus.CounterOpts{Name: "stillwater_outbox_rejected_total", Help: "Outbox lines set aside as invalid when the outbox was opened."},
			stats(func(s bus.Stats) float64 { return float64(s.Rejected) })),
		fault("stream", faultHelp, func() bool { return pub.StreamFault() != nil }),
		fault("stalled", faultHelp, func() bool { _, st := b.Stalled(now()); return st }),
	)
}

// RegisterCHeap registers the C allocator's bytes (OpenCV's Mats,
// FFmpeg's decoders), read at scrape time: state "in_use" growing is a
// leak, "free" growing is memory held back from the system.
func RegisterCHeap(reg prometheus.Registerer, stats func() vision.CHeap) {
	help := "Bytes of the C heap (OpenCV, FFmpeg) by state: in_use, or free inside its arenas."
	reg.MustRegister(
		prometheus.NewGaugeFunc(prometheus.GaugeOpts{Name: "stillwater_c_heap_bytes", Help: help, ConstLabels: prometheus.Labels{"state": "in_use"}},
			func() float64 { return float64(stats().InUse) }),
		prometheus.NewGaugeFunc(prometheus.GaugeOpts{Name: "stillwater_c_heap_bytes", Help: help, ConstLabels: prometheus.Labels{"state": "free"}},
			func() float64 { return float64(stats().Free) }),
	)
}
