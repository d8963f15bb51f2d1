// Package bench runs cameras in real time through the daemon and measures
// its cost: CPU, memory, latency and dropped frames, beside yardstick
// loops (decode alone, ffmpeg, a plain OpenCV loop).
package bench

import (
	"bufio"
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"image"
	"io"
	"log/slog"
	"math"
	"os"
	"os/exec"
	"path/filepath"
	"runtime"
	"runtime/debug"
	"sort"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"text/tabwriter"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/prometheus/client_golang/prometheus"

	"stillwater/alert"
	"stillwater/cmd/stillwater/internal/config"
	"stillwater/cmd/stillwater/internal/daemon"
	"stillwater/cmd/stillwater/internal/metrics"
	"stillwater/cmd/stillwater/internal/pipeline"
	"stillwater/cmd/stillwater/internal/tuning"
	"stillwater/vision"
	"stillwater/vision/synth"
)

// Options are bench's flags.
type Options struct {
	Cameras          int
	Size, EvSize     image.Point
	Fps              float64
	Codec            string
	Duration, Warmup time.Duration
	Clip, EvClip     string
	Seed             int64
	ClipSeconds      float64
	Repeat           int
	Loops            bool
	// Paced adds a yardstick: the clip decoded alone at its frame rate,
	// once, as the cameras are.
	Paced bool
	// OpenCVThreads is OpenCV's pool size for the whole run, the daemon's
	// opencv_threads (1 by default; 0 is OpenCV's default).
	OpenCVThreads int
	// Deblock is the cameras' deblock setting: decode with the codec's
	// deblocking filter (false: skipped, the default).
	Deblock        bool
	DataDir, Cache string
}

// Validate rejects options the run cannot honour.
func (o Options) Validate() error {
	switch {
	case o.Cameras < 1 || o.Cameras > 64:
		return fmt.Errorf("-cameras %d: want 1 to 64", o.Cameras)
	case o.Fps <= 0 || o.Fps > 60:
		return fmt.Errorf("-fps %g: want up to 60", o.Fps)
	case o.Duration <= o.Warmup:
		return fmt.Errorf("-duration %v must be longer than -warmup %v", o.Duration, o.Warmup)
	case o.Warmup < 0:
		return fmt.Errorf("-warmup %v: want 0 or more", o.Warmup)
	case o.ClipSeconds < 2:
		return fmt.Errorf("-clip-seconds %g: want at least 2", o.ClipSeconds)
	case o.Repeat < 1:
		return fmt.Errorf("-repeat %d: want at least 1", o.Repeat)
	case o.OpenCVThreads < 0 || o.OpenCVThreads > 4*runtime.NumCPU():
		return fmt.Errorf("-opencv-threads %d: want 0 (OpenCV's default, one per CPU) to %d", o.OpenCVThreads, 4*runtime.NumCPU())
	}
	switch o.Codec {
	case "h264", "mpeg4", "mjpeg":
	default:
		return fmt.Errorf("-codec %q: want h264, mpeg4 or mjpeg", o.Codec)
	}
	return nil
}

// ParseSize reads WxH or a name.
func ParseSize(s string) (image.Point, error) {
	switch strings.ToLower(s) {
	case "360p":
		return image.Pt(640, 360), nil
	case "720p":
		return image.Pt(1280, 720), nil
	case "1080p":
		return image.Pt(1920, 1080), nil
	}
	w, h, ok := strings.Cut(strings.ToLower(s), "x")
	W, errW := strconv.Atoi(w)
	H, errH := strconv.Atoi(h)
	if !ok || errW != nil || errH != nil || W < 64 || H < 48 || W > 7680 || H > 4320 {
		return image.Point{}, fmt.Errorf("%q: want WxH such as 640x360, or 360p, 720p, 1080p", s)
	}
	return image.Pt(W, H), nil
}

// Result is what bench measured; it is printed as a table and as one
// JSON line.
type Result struct {
	Cameras      int     `json:"cameras"`
	Size         string  `json:"size"`
	FPS          float64 `json:"fps"`
	Codec        string  `json:"codec"`
	Clip         string  `json:"clip"`
	EvidenceSize string  `json:"evidence_size,omitempty"`
	EvidenceClip string  `json:"evidence_clip,omitempty"`
	DurationS    float64 `json:"duration_s"`
	WindowS      float64 `json:"window_s"`

	CPUs          int        `json:"cpus"`
	OpenCVThreads int        `json:"opencv_threads"`
	Deblock       bool       `json:"deblock"`
	CPUModel      string     `json:"cpu_model"`
	LoadAvg       [3]float64 `json:"load_avg_start"`
	LoadEnd       [3]float64 `json:"load_avg_end"`
	Go            string     `json:"go"`

	PerCamera         []benchCamera `json:"per_camera"`
	FPSMin, FPSMedian float64       `json:"-"`
	FramesExpected    int64         `json:"frames_expected"`
	FramesProcessed   int64         `json:"frames_processed"`
	FramesDropped     int64         `json:"frames_dropped"`
	ReadRatio         float64       `json:"read_ratio"`
	AgeMaxS           float64       `json:"frame_age_max_s"`
	AgeP50S           float64       `json:"frame_age_p50_s"`
	AgeP99S           float64       `json:"frame_age_p99_s"`
	AgeSamples        int           `json:"frame_age_samples"`

	LatencySamples int     `json:"latency_samples"`
	LatencyP50ms   float64 `json:"latency_p50_ms"`
	LatencyP99ms   float64 `json:"latency_p99_ms"`
	LatencyMaxms   float64 `json:"latency_max_ms"`

	CPUSelfS         float64 `json:"cpu_daemon_s"`
	CPUChildrenS     float64 `json:"cpu_children_s"`
	Cores            float64 `json:"cores"`
	CPUPerCameraSecS float64 `json:"cpu_s_per_camera_s"`
	DaemonMsPerFrame float64 `json:"daemon_cpu_ms_per_frame"`
	RSSBaselineMB    float64 `json:"rss_before_mb"`
	RSSPeakMB        float64 `json:"rss_peak_mb"`
	RSSFinalMB       float64 `json:"rss_final_mb"`
	RSSWarmMB        float64 `json:"rss_after_warmup_mb"`
	RSSPerCameraMB   float64 `json:"rss_per_camera_mb"`
	PssChildrenMB    float64 `json:"pss_children_mb"`
	// RSSQuartersMB is the resident size at each quarter of the window
	// (after 25, 50, 75 and 100 %), to tell growth from a plateau.
	RSSQuartersMB [4]float64 `json:"rss_quarters_mb"`
	// Go's own share: heap in use and all it holds from the system, at
	// the warm-up and at the end; the rest of the resident size is C's
	// (OpenCV, FFmpeg) and the binary's.
	GoHeapWarmMB  float64 `json:"go_heap_after_warmup_mb"`
	GoHeapFinalMB float64 `json:"go_heap_final_mb"`
	GoSysFinalMB  float64 `json:"go_sys_final_mb"`
	// The C allocator's (OpenCV's and FFmpeg's) bytes in use and free
	// inside its arenas, at the warm-up and at the end: in use growing is
	// a leak, free growing is the heap fragmenting.
	CInUseWarmMB      float64 `json:"c_heap_in_use_after_warmup_mb"`
	CInUseFinalMB     float64 `json:"c_heap_in_use_final_mb"`
	CFreeWarmMB       float64 `json:"c_heap_free_after_warmup_mb"`
	CFreeFinalMB      float64 `json:"c_heap_free_final_mb"`
	PeakIncludesSetup bool    `json:"rss_peak_includes_setup,omitempty"`

	Faults map[string]int `json:"faults"`

	DecodeMsPerFrame       float64 `json:"decode_cpu_ms_per_frame,omitempty"`
	FFmpegDecodeMsPerFrame float64 `json:"ffmpeg_decode_cpu_ms_per_frame,omitempty"`
	NaiveMsPerFrame        float64 `json:"naive_cpu_ms_per_frame,omitempty"`
	PipelineMsPerFrame     float64 `json:"pipeline_cpu_ms_per_frame,omitempty"`
	PipelineFrames         int     `json:"pipeline_frames,omitempty"`
	RatioPipelineDecode    float64 `json:"pipeline_over_decode,omitempty"`
	RatioPipelineNaive     float64 `json:"pipeline_over_naive,omitempty"`
	PacedDecodeMsPerFrame  float64 `json:"paced_decode_cpu_ms_per_frame,omitempty"`
	RatioPacedDecode       float64 `json:"daemon_over_paced_decode,omitempty"`
	LoopFrames             int     `json:"loop_frames,omitempty"`
	RatioDecode            float64 `json:"daemon_over_decode,omitempty"`
	RatioNaive             float64 `json:"daemon_over_naive,omitempty"`
}

// benchCamera is one camera's share of the window.
type benchCamera struct {
	ID        string  `json:"id"`
	FPS       float64 `json:"fps"`
	Processed int64   `json:"processed"`
	Dropped   int64   `json:"dropped"`
	AgeMaxS   float64 `json:"frame_age_max_s"`
}

// Run prepares the clips, runs the daemon over them and the yardsticks
// after it.
func Run(ctx context.Context, o Options, log *slog.Logger, progress io.Writer) (Result, error) {
	res := Result{Cameras: o.Cameras, FPS: o.Fps, Codec: o.Codec, DurationS: o.Duration.Seconds(), WindowS: (o.Duration - o.Warmup).Seconds(),
		CPUs: runtime.NumCPU(), OpenCVThreads: o.OpenCVThreads, Deblock: o.Deblock, CPUModel: cpuModel(), LoadAvg: loadAvg(), Go: runtime.Version(), Faults: map[string]int{}}
	cam, clip, evClip, clipFrames, err := benchClips(ctx, o, progress)
	if err != nil {
		return res, err
	}
	res.Clip, res.EvidenceClip = clip, evClip
	info, err := vision.ProbeClip(clip)
	if err != nil {
		return res, err
	}
	res.Size = fmt.Sprintf("%dx%d", info.Size.X, info.Size.Y)
	if info.FPS > 0 {
		res.FPS = info.FPS
	}
	if evClip != "" {
		ev, err := vision.ProbeClip(evClip)
		if err != nil {
			return res, err
		}
		res.EvidenceSize = fmt.Sprintf("%dx%d", ev.Size.X, ev.Size.Y)
	}

	dir := o.DataDir
	if dir == "" {
		d, err := os.MkdirTemp("", "stillwater-bench-")
		if err != nil {
			return res, err
		}
		defer os.RemoveAll(d)
		dir = d
	}
	cfg := config.Defaults()
	cfg.DataDir = dir
	cfg.HTTP.Listen = "127.0.0.1:0"
	cfg.Bus.Listen = "127.0.0.1:-1"
	cfg.OpenCVThreads = o.OpenCVThreads
	for i := 0; i < o.Cameras; i++ {
		c := cam
		c.ID = fmt.Sprintf("cam%d", i+1)
		c.Deblock = o.Deblock
		cfg.Cameras = append(cfg.Cameras, c)
	}
	if err := cfg.Validate(); err != nil {
		return res, fmt.Errorf("bench: camera configuration: %w", err)
	}
	// As the daemon does at start-up; the yardsticks after it share the
	// pool size.
	if err := cfg.ApplyOpenCVThreads(); err != nil {
		return res, fmt.Errorf("bench: %w", err)
	}

	// What the preparation used (rendering holds large tables) is given
	// back, and the peak resident size reset, so that the peak is the
	// daemon's.
	runtime.GC()
	debug.FreeOSMemory()
	if os.WriteFile("/proc/self/clear_refs", []byte("5"), 0) != nil {
		res.PeakIncludesSetup = true
	}
	res.RSSBaselineMB = float64(procStatus("self", "VmRSS")) / 1024

	if err := benchDaemon(ctx, o, cfg, &res, log, progress); err != nil {
		return res, err
	}
	if o.Loops {
		if err := benchLoops(ctx, o, clip, clipFrames, cfg.Cameras[0], &res, progress); err != nil {
			return res, err
		}
	}
	res.LoadEnd = loadAvg()
	return res, nil
}

// benchClips returns the camera (calibration, source, evidence stream)
// and the clips it plays: generated and cached, or given.
func benchClips(ctx context.Context, o Options, progress io.Writer) (cam config.CameraConfig, clip, evClip string, frames int, err error) {
	if o.Clip != "" {
		info, err := vision.ProbeClip(o.Clip)
		if err != nil {
			return cam, "", "", 0, err
		}
		cam = givenClipCamera(o.Clip, info.Size)
		cam.EvidenceSource = o.EvClip
		return finishBenchCamera(cam), o.Clip, o.EvClip, info.Frames, nil
	}
	cache := o.Cache
	if cache == "" {
		if cache, err = synth.CacheDir(); err != nil {
			base, uerr := os.UserCacheDir()
			if uerr != nil {
				return cam, "", "", 0, fmt.Errorf("bench: no render cache: %v; give -cache", err)
			}
			cache = filepath.Join(base, "stillwater", "synth")
		}
	}
	base := synth.FamilyScene(o.Seed, synth.Intruder)
	render := func(size image.Point, codec string) (string, synth.Truth, error) {
		s, err := synth.Sized(base, size.X, size.Y, o.Fps, o.ClipSeconds, codec)
		if err != nil {
			return "", synth.Truth{}, err
		}
		fmt.Fprintf(progress, "clip %dx%d %g fps %s, %g s (rendered once, then cached in %s) ...\n", size.X, size.Y, o.Fps, codec, o.ClipSeconds, cache)
		video, _, truth, err := synth.Cached(ctx, s, cache)
		return video, truth, err
	}
	clip, truth, err := render(o.Size, o.Codec)
	if err != nil {
		return cam, "", "", 0, fmt.Errorf("bench: %w", err)
	}
	calTruth := truth
	evClip = o.EvClip
	if o.EvSize != (image.Point{}) && evClip == "" {
		var evTruth synth.Truth
		if evClip, evTruth, err = render(o.EvSize, "h264"); err != nil {
			return cam, "", "", 0, fmt.Errorf("bench: %w", err)
		}
		calTruth = evTruth
	}
	if cam, err = tuning.CameraFromLabels(calTruth, clip); err != nil {
		return cam, "", "", 0, fmt.Errorf("bench: %w", err)
	}
	cam.EvidenceSource = evClip
	if calTruth.Width != truth.Width || calTruth.Height != truth.Height {
		// Calibrated on the main stream, as an installer would; scaled
		// to the stream searched.
		cam.SourcePx = [2]int{truth.Width, truth.Height}
	}
	return finishBenchCamera(cam), clip, evClip, truth.Frames, nil
}

// givenClipCamera watches a clip of unknown scene as if an 8 × 4 m pool
// filled the middle of the frame.
func givenClipCamera(clip string, size image.Point) config.CameraConfig {
	w, h := float64(size.X), float64(size.Y)
	return config.CameraConfig{
		ID: "clip", Source: clip,
		CalibrationConfig: config.CalibrationConfig{
			Pool:    config.PoolConfig{Length: 8, Width: 4},
			Corners: [][2]float64{{0.1 * w, 0.8 * h}, {0.9 * w, 0.8 * h}, {0.9 * w, 0.2 * h}, {0.1 * w, 0.2 * h}},
			Frame:   [2]int{size.X, size.Y},
			Lens:    &config.LensConfig{HFOVDeg: 90},
		},
	}
}

// finishBenchCamera plays the clip as a camera would send it.
func finishBenchCamera(c config.CameraConfig) config.CameraConfig {
	c.Realtime, c.Loop = true, true
	c.Detect = config.DefaultDetect()
	c.FrameTimeout = config.Duration(config.DefaultFrameTimeout)
	return c
}

// benchDaemon runs serve over the cameras for the duration and measures.
func benchDaemon(ctx context.Context, o Options, cfg config.Config, res *Result, log *slog.Logger, progress io.Writer) error {
	reg := prometheus.NewRegistry()
	runCtx, stop := context.WithCancel(ctx)
	defer stop()
	var (
		mu        sync.Mutex
		nc        *nats.Conn
		latencies []float64
		counting  time.Time // targets taken after the warm-up
	)
	ready := make(chan error, 1)
	onReady := func(busURL, _ string) {
		c, err := nats.Connect(busURL)
		if err != nil {
			ready <- fmt.Errorf("bench subscriber: %w", err)
			return
		}
		nc = c
		_, err = nc.Subscribe(cfg.Bus.Prefix+".*.>", func(m *nats.Msg) {
			at := time.Now()
			var k struct {
				Kind      string    `json:"kind"`
				FrameTime time.Time `json:"frame_time"`
				Fault     string    `json:"fault"`
				Active    bool      `json:"active"`
			}
			if json.Unmarshal(m.Data, &k) != nil {
				return
			}
			mu.Lock()
			defer mu.Unlock()
			switch k.Kind {
			case alert.KindTarget, alert.KindCleared:
				if !counting.IsZero() && k.FrameTime.After(counting) {
					latencies = append(latencies, at.Sub(k.FrameTime).Seconds()*1000)
				}
			case alert.KindFault:
				if k.Active {
					res.Faults[k.Fault]++
				}
			}
		})
		if err == nil {
			err = nc.Flush()
		}
		ready <- err
	}
	done := make(chan error, 1)
	fmt.Fprintf(progress, "running %d camera(s) for %v ...\n", o.Cameras, o.Duration)
	start := time.Now()
	go func() { done <- daemon.Serve(runCtx, cfg, daemon.Deps{Log: log, Registry: reg, Ready: onReady}) }()
	select {
	case err := <-ready:
		if err != nil {
			stop()
			<-done
			return err
		}
	case err := <-done:
		return fmt.Errorf("bench: the daemon stopped before it was ready: %v", err)
	case <-time.After(time.Minute):
		stop()
		<-done
		return errors.New("bench: the daemon was not ready within a minute")
	}
	defer func() {
		if nc != nil {
			nc.Close()
		}
	}()

	// Only evidence streams start children (their ffmpeg); without them
	// the scan of /proc is left out, as it would be counted as the
	// daemon's CPU (1.4–1.9 % of one 1080p camera's, by perf).
	kids := &childCPU{last: map[int]float64{}, off: res.EvidenceSize == ""}
	ageMax := map[string]float64{}
	var agesAll []float64
	var at0 benchSnap
	tick := time.NewTicker(500 * time.Millisecond)
	defer tick.Stop()
	warm := start.Add(o.Warmup)
	end := start.Add(o.Duration)
	warmed := false
	for time.Now().Before(end) {
		select {
		case <-ctx.Done():
			stop()
			<-done
			return ctx.Err()
		case err := <-done:
			return fmt.Errorf("bench: the daemon stopped early: %v", err)
		case <-tick.C:
		}
		kids.sample()
		if !warmed && !time.Now().Before(warm) {
			warmed = true
			at0 = takeSnap(reg, kids)
			res.RSSWarmMB = pipeline.Round3(float64(procStatus("self", "VmRSS")) / 1024)
			res.GoHeapWarmMB, _ = goMemMB()
			res.CInUseWarmMB, res.CFreeWarmMB = cHeapMB()
			mu.Lock()
			counting = at0.at
			mu.Unlock()
			continue
		}
		if warmed {
			for q := 0; q < 3; q++ {
				if res.RSSQuartersMB[q] == 0 && time.Since(warm) >= time.Duration(q+1)*end.Sub(warm)/4 {
					res.RSSQuartersMB[q] = pipeline.Round3(float64(procStatus("self", "VmRSS")) / 1024)
				}
			}
			ages, _ := metrics.Values(reg, "stillwater_frame_age_seconds", "camera")
			for id, a := range ages {
				ageMax[id] = math.Max(ageMax[id], a)
				agesAll = append(agesAll, a)
			}
		}
	}
	kids.sample()
	at1 := takeSnap(reg, kids)
	res.RSSPeakMB = float64(procStatus("self", "VmHWM")) / 1024
	res.RSSFinalMB = float64(procStatus("self", "VmRSS")) / 1024
	res.RSSQuartersMB[3] = pipeline.Round3(res.RSSFinalMB)
	res.GoHeapFinalMB, res.GoSysFinalMB = goMemMB()
	res.CInUseFinalMB, res.CFreeFinalMB = cHeapMB()
	for _, pid := range childPIDs() {
		res.PssChildrenMB += float64(procPss(pid)) / 1024
	}
	stop()
	if err := <-done; err != nil {
		return fmt.Errorf("bench: daemon: %w", err)
	}

	window := at1.at.Sub(at0.at).Seconds()
	res.WindowS = pipeline.Round3(window)
	var fpss []float64
	for _, c := range cfg.Cameras {
		p := int64(at1.processed[c.ID] - at0.processed[c.ID])
		d := int64(at1.dropped[c.ID] - at0.dropped[c.ID])
		bc := benchCamera{ID: c.ID, FPS: pipeline.Round3(float64(p) / window), Processed: p, Dropped: d, AgeMaxS: pipeline.Round3(ageMax[c.ID])}
		res.PerCamera = append(res.PerCamera, bc)
		res.FramesProcessed += p
		res.FramesDropped += d
		res.AgeMaxS = math.Max(res.AgeMaxS, bc.AgeMaxS)
		fpss = append(fpss, bc.FPS)
	}
	sort.Float64s(fpss)
	res.FPSMin, res.FPSMedian = fpss[0], fpss[len(fpss)/2]
	if len(agesAll) > 0 {
		sort.Float64s(agesAll)
		res.AgeP50S, res.AgeP99S, res.AgeSamples = pipeline.Round3(percentile(agesAll, 0.5)), pipeline.Round3(percentile(agesAll, 0.99)), len(agesAll)
	}
	res.FramesExpected = int64(math.Round(res.FPS * window * float64(o.Cameras)))
	if res.FramesExpected > 0 {
		res.ReadRatio = pipeline.Round3(float64(res.FramesProcessed+res.FramesDropped) / float64(res.FramesExpected))
	}
	res.CPUSelfS = pipeline.Round3(at1.self - at0.self)
	res.CPUChildrenS = pipeline.Round3(at1.children - at0.children)
	cpu := res.CPUSelfS + res.CPUChildrenS
	res.Cores = pipeline.Round3(cpu / window)
	res.CPUPerCameraSecS = pipeline.Round3(cpu / window / float64(o.Cameras))
	if n := res.FramesProcessed + res.FramesDropped; n > 0 {
		res.DaemonMsPerFrame = pipeline.Round3(res.CPUSelfS * 1000 / float64(n))
	}
	res.RSSPerCameraMB = pipeline.Round3(res.RSSFinalMB / float64(o.Cameras))
	res.RSSPeakMB, res.RSSFinalMB, res.PssChildrenMB = pipeline.Round3(res.RSSPeakMB), pipeline.Round3(res.RSSFinalMB), pipeline.Round3(res.PssChildrenMB)
	res.RSSBaselineMB = pipeline.Round3(res.RSSBaselineMB)
	mu.Lock()
	defer mu.Unlock()
	res.LatencySamples = len(latencies)
	if len(latencies) > 0 {
		sort.Float64s(latencies)
		res.LatencyP50ms = pipeline.Round3(percentile(latencies, 0.50))
		res.LatencyP99ms = pipeline.Round3(percentile(latencies, 0.99))
		res.LatencyMaxms = pipeline.Round3(latencies[len(latencies)-1])
	}
	return nil
}

// benchSnap is the counters at one moment.
type benchSnap struct {
	at                 time.Time
	self, children     float64 // CPU seconds
	processed, dropped map[string]float64
}

func takeSnap(reg prometheus.Gatherer, kids *childCPU) benchSnap {
	s := benchSnap{at: time.Now(), self: selfCPU(), children: kids.total()}
	s.processed, _ = metrics.Values(reg, "stillwater_frames_processed_total", "camera")
	s.dropped, _ = metrics.Values(reg, "stillwater_frames_dropped_total", "camera")
	return s
}

// percentile of sorted values, nearest rank.
func percentile(sorted []float64, p float64) float64 {
	i := int(math.Ceil(p*float64(len(sorted)))) - 1
	return sorted[min(max(i, 0), len(sorted)-1)]
}

// benchLoops runs the yardsticks over the clip, repeat times each, and
// keeps the medians of CPU milliseconds per frame. The last of them is
// the camera's own pipeline (cam) over the clip as fast as it decodes,
// which is what `stillwater replay` does: the same work per frame as the
// daemon's, without its pacing, bus, evidence and HTTP, measured as the
// yardsticks are.
func benchLoops(ctx context.Context, o Options, clip string, frames int, cam config.CameraConfig, res *Result, progress io.Writer) error {
	if frames <= 0 {
		frames = int(math.Round(res.FPS * o.ClipSeconds))
	}
	fmt.Fprintf(progress, "yardsticks over %s (%d frames, %d runs each) ...\n", filepath.Base(clip), frames, o.Repeat)
	var dec, ff, naive, pipe []float64
	cam.Source = clip
	quiet := slog.New(slog.NewTextHandler(io.Discard, nil))
	for i := 0; i < o.Repeat; i++ {
		c0 := selfCPU()
		n, err := vision.DecodeLoop(ctx, clip, frames)
		if err != nil {
			return err
		}
		dec = append(dec, (selfCPU()-c0)*1000/float64(max(n, 1)))
		res.LoopFrames = n

		k0 := childrenCPU()
		out, err := exec.CommandContext(ctx, "ffmpeg", "-nostdin", "-hide_banner", "-loglevel", "error", "-threads", "1", "-i", clip,
			"-frames:v", strconv.Itoa(n), "-f", "null", "-").CombinedOutput()
		if err != nil {
			return fmt.Errorf("bench: ffmpeg decode: %v: %s", err, bytes.TrimSpace(out))
		}
		ff = append(ff, (childrenCPU()-k0)*1000/float64(max(n, 1)))

		c0 = selfCPU()
		n, _, err = vision.NaiveLoop(ctx, clip, frames, naiveMinArea)
		if err != nil {
			return err
		}
		naive = append(naive, (selfCPU()-c0)*1000/float64(max(n, 1)))

		c0 = selfCPU()
		st, err := tuning.ReplayClip(ctx, cam, "stillwater", io.Discard, quiet)
		if err != nil {
			return fmt.Errorf("bench: the pipeline over the clip: %w", err)
		}
		pipe = append(pipe, (selfCPU()-c0)*1000/float64(max(st.Frames, 1)))
		res.PipelineFrames = st.Frames
	}
	if o.Paced {
		fmt.Fprintf(progress, "the clip decoded alone at %g fps (%d frames) ...\n", res.FPS, frames)
		c0 := selfCPU()
		n, err := vision.DecodeLoopAt(ctx, clip, frames, res.FPS)
		if err != nil {
			return err
		}
		res.PacedDecodeMsPerFrame = pipeline.Round3((selfCPU() - c0) * 1000 / float64(max(n, 1)))
		if res.PacedDecodeMsPerFrame > 0 {
			res.RatioPacedDecode = pipeline.Round3(res.DaemonMsPerFrame / res.PacedDecodeMsPerFrame)
		}
	}
	res.DecodeMsPerFrame = pipeline.Round3(medianOf(dec))
	res.FFmpegDecodeMsPerFrame = pipeline.Round3(medianOf(ff))
	res.NaiveMsPerFrame = pipeline.Round3(medianOf(naive))
	res.PipelineMsPerFrame = pipeline.Round3(medianOf(pipe))
	if res.DecodeMsPerFrame > 0 {
		res.RatioPipelineDecode = pipeline.Round3(res.PipelineMsPerFrame / res.DecodeMsPerFrame)
	}
	if res.NaiveMsPerFrame > 0 {
		res.RatioPipelineNaive = pipeline.Round3(res.PipelineMsPerFrame / res.NaiveMsPerFrame)
	}
	if res.DecodeMsPerFrame > 0 {
		res.RatioDecode = pipeline.Round3(res.DaemonMsPerFrame / res.DecodeMsPerFrame)
	}
	if res.NaiveMsPerFrame > 0 {
		res.RatioNaive = pipeline.Round3(res.DaemonMsPerFrame / res.NaiveMsPerFrame)
	}
	return nil
}

// naiveMinArea is the plain loop's pixel-area gate at 640 px wide: about
// a small child's head and shoulders seen from above at mid-pool by a
// typical backyard camera (common practice for such loops: a few dozen
// pixels).
const naiveMinArea = 50

func medianOf(v []float64) float64 {
	s := append([]float64(nil), v...)
	sort.Float64s(s)
	return s[len(s)/2]
}

// Print writes the table.
func (r Result) Print(w io.Writer) {
	fmt.Fprintf(w, "stillwater bench: %d camera(s), %s at %g fps (%s), played in real time in a loop\n", r.Cameras, r.Size, r.FPS, r.Codec)
	if r.EvidenceSize != "" {
		fmt.Fprintf(w, "evidence stream: %s, copied without decoding\n", r.EvidenceSize)
	}
	fmt.Fprintf(w, "machine: %d CPUs (%s), %s, OpenCV pool of %s; load average %.2f %.2f %.2f at the start, %.2f %.2f %.2f at the end\n",
		r.CPUs, r.CPUModel, r.Go, poolLine(r.OpenCVThreads), r.LoadAvg[0], r.LoadAvg[1], r.LoadAvg[2], r.LoadEnd[0], r.LoadEnd[1], r.LoadEnd[2])
	fmt.Fprintf(w, "run: %.0f s, measured over the last %.1f s; the cameras decode %s\n\n", r.DurationS, r.WindowS, deblockLine(r.Deblock))
	tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', 0)
	fmt.Fprintln(tw, "camera\tframes/s\tprocessed\tdropped\tframe age max")
	for _, c := range r.PerCamera {
		fmt.Fprintf(tw, "%s\t%.2f\t%d\t%d\t%.2f s\n", c.ID, c.FPS, c.Processed, c.Dropped, c.AgeMaxS)
	}
	tw.Flush()
	fmt.Fprintln(w)
	tw = tabwriter.NewWriter(w, 0, 0, 2, ' ', 0)
	fmt.Fprintf(tw, "frames\t%d of %d due searched (%.1f %%), %d dropped; %.1f %% of the frames due were read\n", r.FramesProcessed, r.FramesExpected,
		pct(r.FramesProcessed, r.FramesExpected), r.FramesDropped, r.ReadRatio*100)
	fmt.Fprintf(tw, "frame age\tp50 %.0f ms, p99 %.0f ms, max %.0f ms: from capture to messages handed to the bus (%d samples of each camera's latest frame)\n",
		r.AgeP50S*1000, r.AgeP99S*1000, r.AgeMaxS*1000, r.AgeSamples)
	if r.LatencySamples > 0 {
		fmt.Fprintf(tw, "frame to publish\tp50 %.0f ms, p99 %.0f ms, max %.0f ms (%d messages)\n", r.LatencyP50ms, r.LatencyP99ms, r.LatencyMaxms, r.LatencySamples)
	} else {
		fmt.Fprintf(tw, "frame to publish\tno target message in the window\n")
	}
	fmt.Fprintf(tw, "CPU\t%.2f cores, %.3f CPU s per camera-second (daemon %.1f s, ffmpeg children %.1f s)\n", r.Cores, r.CPUPerCameraSecS, r.CPUSelfS, r.CPUChildrenS)
	peak := ""
	if r.PeakIncludesSetup {
		peak = " (includes preparing the clips)"
	}
	fmt.Fprintf(tw, "memory\tpeak %.0f MB%s, final %.0f MB = %.0f MB per camera (%.0f MB before the cameras started, %.0f MB after the warm-up); ffmpeg children %.0f MB proportional\n",
		r.RSSPeakMB, peak, r.RSSFinalMB, r.RSSPerCameraMB, r.RSSBaselineMB, r.RSSWarmMB, r.PssChildrenMB)
	fmt.Fprintf(tw, "memory over the window\t%.0f, %.0f, %.0f, %.0f MB at each quarter; Go heap in use %.0f MB after the warm-up, %.0f MB at the end (Go holds %.0f MB from the system)\n",
		r.RSSQuartersMB[0], r.RSSQuartersMB[1], r.RSSQuartersMB[2], r.RSSQuartersMB[3], r.GoHeapWarmMB, r.GoHeapFinalMB, r.GoSysFinalMB)
	fmt.Fprintf(tw, "C heap (OpenCV, FFmpeg)\t%.0f MB in use and %.0f MB free inside it after the warm-up; %.0f MB in use and %.0f MB free at the end\n",
		r.CInUseWarmMB, r.CFreeWarmMB, r.CInUseFinalMB, r.CFreeFinalMB)
	fmt.Fprintf(tw, "faults raised\t%s\n", faultList(r.Faults))
	if r.DecodeMsPerFrame > 0 {
		fmt.Fprintf(tw, "same clip alone\tOpenCV decode %.2f ms/frame, ffmpeg decode (1 thread) %.2f ms/frame, plain OpenCV loop %.2f ms/frame (CPU, median of runs over %d frames)\n",
			r.DecodeMsPerFrame, r.FFmpegDecodeMsPerFrame, r.NaiveMsPerFrame, r.LoopFrames)
		fmt.Fprintf(tw, "daemon\t%.2f ms CPU per frame decoded = %.2f× OpenCV decode alone, %.2f× the plain loop\n", r.DaemonMsPerFrame, r.RatioDecode, r.RatioNaive)
		fmt.Fprintf(tw, "pipeline alone\t%.2f ms CPU per frame = %.2f× OpenCV decode alone, %.2f× the plain loop: the camera's pipeline over the same clip as fast as it decodes, as stillwater replay runs it (decoding, picture checks, detection, tracking, messages; no pacing, bus or evidence; median of runs)\n",
			r.PipelineMsPerFrame, r.RatioPipelineDecode, r.RatioPipelineNaive)
	}
	if r.PacedDecodeMsPerFrame > 0 {
		fmt.Fprintf(tw, "paced\tOpenCV decode alone at %g fps %.2f ms/frame (CPU, one run); daemon = %.2f× that\n", r.FPS, r.PacedDecodeMsPerFrame, r.RatioPacedDecode)
	}
	tw.Flush()
}

// poolLine names OpenCV's pool size as opencv_threads sets it.
func deblockLine(on bool) string {
	if on {
		return "with the deblocking filter (deblock true)"
	}
	return "without the deblocking filter (deblock false)"
}

func poolLine(n int) string {
	if n == 0 {
		return "one thread per CPU (opencv_threads 0)"
	}
	return fmt.Sprintf("%d thread(s) (opencv_threads %d)", n, n)
}

func pct(a, b int64) float64 {
	if b == 0 {
		return 0
	}
	return 100 * float64(a) / float64(b)
}

func faultList(f map[string]int) string {
	if len(f) == 0 {
		return "none"
	}
	var ks []string
	for k := range f {
		ks = append(ks, k)
	}
	sort.Strings(ks)
	var b strings.Builder
	for i, k := range ks {
		if i > 0 {
			b.WriteString(", ")
		}
		fmt.Fprintf(&b, "%s ×%d", k, f[k])
	}
	return b.String()
}

// selfCPU is this process's CPU time, user and system, in seconds.
func selfCPU() float64 {
	var ru syscall.Rusage
	if syscall.Getrusage(syscall.RUSAGE_SELF, &ru) != nil {
		return 0
	}
	return tv(ru.Utime) + tv(ru.Stime)
}

// childrenCPU is the CPU time of the children this process has waited
// for, in seconds.
func childrenCPU() float64 {
	var ru syscall.Rusage
	if syscall.Getrusage(syscall.RUSAGE_CHILDREN, &ru) != nil {
		return 0
	}
	return tv(ru.Utime) + tv(ru.Stime)
}

func tv(t syscall.Timeval) float64 { return float64(t.Sec) + float64(t.Usec)/1e6 }

// childCPU adds up the CPU time of the running children (the evidence
// streams' ffmpeg), sampled from /proc: a child's last sample counts once
// it is gone.
type childCPU struct {
	last map[int]float64
	off  bool // no evidence streams, so no children to look for
}

func (c *childCPU) sample() {
	if c.off {
		return
	}
	for _, pid := range childPIDs() {
		if s, ok := procCPU(pid); ok {
			c.last[pid] = s
		}
	}
}

func (c *childCPU) total() float64 {
	var t float64
	for _, s := range c.last {
		t += s
	}
	return t
}

// childPIDs lists this process's children.
func childPIDs() []int {
	files, _ := filepath.Glob(fmt.Sprintf("/proc/%d/task/*/children", os.Getpid()))
	var out []int
	for _, f := range files {
		b, err := os.ReadFile(f)
		if err != nil {
			continue
		}
		for _, p := range strings.Fields(string(b)) {
			if pid, err := strconv.Atoi(p); err == nil {
				out = append(out, pid)
			}
		}
	}
	return out
}

// clockTicks is the unit of /proc/PID/stat's times: USER_HZ, 100 on
// Linux for every architecture it reports to user space.
const clockTicks = 100

// procCPU reads a process's user and system time, in seconds.
func procCPU(pid int) (float64, bool) {
	b, err := os.ReadFile(fmt.Sprintf("/proc/%d/stat", pid))
	if err != nil {
		return 0, false
	}
	i := bytes.LastIndexByte(b, ')')
	if i < 0 {
		return 0, false
	}
	f := strings.Fields(string(b[i+1:]))
	if len(f) < 13 {
		return 0, false
	}
	// After the command: state is field 3 of the line, utime 14, stime 15.
	u, err1 := strconv.ParseFloat(f[11], 64)
	s, err2 := strconv.ParseFloat(f[12], 64)
	if err1 != nil || err2 != nil {
		return 0, false
	}
	return (u + s) / clockTicks, true
}

// goMemMB returns Go's heap in use and all Go holds from the system, in MB.
func goMemMB() (heap, sys float64) {
	var m runtime.MemStats
	runtime.ReadMemStats(&m)
	return pipeline.Round3(float64(m.HeapInuse) / (1 << 20)), pipeline.Round3(float64(m.Sys) / (1 << 20))
}

// cHeapMB returns the C allocator's bytes in use and free, in MB.
func cHeapMB() (inUse, free float64) {
	h := vision.CHeapStats()
	return pipeline.Round3(float64(h.InUse) / (1 << 20)), pipeline.Round3(float64(h.Free) / (1 << 20))
}

// procStatus reads a kB field (VmRSS, VmHWM) of /proc/PID/status; 0 when
// it cannot.
func procStatus(pid, field string) int64 {
	f, err := os.Open("/proc/" + pid + "/status")
	if err != nil {
		return 0
	}
	defer f.Close()
	sc := bufio.NewScanner(f)
	for sc.Scan() {
		if v, ok := strings.CutPrefix(sc.Text(), field+":"); ok {
			n, _ := strconv.ParseInt(strings.TrimSpace(strings.TrimSuffix(strings.TrimSpace(v), "kB")), 10, 64)
			return n
		}
	}
	return 0
}

// procPss reads a process's proportional set size in kB: its resident
// pages, those it shares (the FFmpeg libraries) divided among their
// users; 0 when it cannot.
func procPss(pid int) int64 {
	b, err := os.ReadFile(fmt.Sprintf("/proc/%d/smaps_rollup", pid))
	if err != nil {
		return 0
	}
	for _, l := range strings.Split(string(b), "\n") {
		if v, ok := strings.CutPrefix(l, "Pss:"); ok {
			n, _ := strconv.ParseInt(strings.TrimSpace(strings.TrimSuffix(strings.TrimSpace(v), "kB")), 10, 64)
			return n
		}
	}
	return 0
}

// loadAvg reads the 1, 5 and 15 minute load averages.
func loadAvg() [3]float64 {
	var out [3]float64
	b, err := os.ReadFile("/proc/loadavg")
	if err != nil {
		return out
	}
	f := strings.Fields(string(b))
	for i := 0; i < 3 && i < len(f); i++ {
		out[i], _ = strconv.ParseFloat(f[i], 64)
	}
	return out
}

// cpuModel is the processor's name from /proc/cpuinfo.
func cpuModel() string {
	b, err := os.ReadFile("/proc/cpuinfo")
	if err != nil {
		return "unknown"
	}
	for _, l := range strings.Split(string(b), "\n") {
		if k, v, ok := strings.Cut(l, ":"); ok && strings.TrimSpace(k) == "model name" {
			return strings.TrimSpace(v)
		}
	}
	return "unknown"
}
