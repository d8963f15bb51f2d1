package main

import (
	"context"
	"encoding/json"
	"io"
	"log/slog"
	"sync"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"stillwater/alert"
	"stillwater/cmd/stillwater/internal/demo"
	"stillwater/cmd/stillwater/internal/metrics"
	"stillwater/cmd/stillwater/internal/pipeline"
	"stillwater/cmd/stillwater/internal/watch"
	"stillwater/vision/refdata"
)

// slowSink stands for a slow step on the frame path: handing a target to
// it takes delay. It keeps every message.
type slowSink struct {
	delay time.Duration
	mu    sync.Mutex
	msgs  []pipeline.Message
	seen  chan pipeline.Message
}

func (s *slowSink) Send(_ context.Context, m pipeline.Message) error {
	if m.Kind == alert.KindTarget {
		time.Sleep(s.delay)
	}
	s.mu.Lock()
	s.msgs = append(s.msgs, m)
	s.mu.Unlock()
	select {
	case s.seen <- m:
	default:
	}
	return nil
}

// TestSlowStepRaisesProcessingLag plays the child scene in real time
// through a camera whose every target takes 1.2 s to hand on: once the
// child is found, the frames searched are over a second old, which must
// raise processing_lag on the bus, show in stillwater_frame_age_seconds
// and in frames dropped to catch up (a file played in real time is no
// longer silent when it falls behind).
func TestSlowStepRaisesProcessingLag(t *testing.T) {
	truth, clip, dir := renderScene(t, "child", 7, nil)
	cfg := demo.Config(truth, clip, dir, true)
	reg := prometheus.NewRegistry()
	met := metrics.New(reg, "test")
	sk := &slowSink{delay: 1200 * time.Millisecond, seen: make(chan pipeline.Message, 64)}
	log := slog.New(slog.NewTextHandler(io.Discard, nil))
	w := watch.New(cfg.Cameras[0], sk, func(time.Time) bool { return true }, time.Now, log, met.Camera("demo"), 0, "test", watch.EvidenceSettings{})

	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	done := make(chan error, 1)
	go func() { done <- w.Run(ctx) }()
	var lag *alert.Fault
	var age float64
	deadline := time.After(60 * time.Second)
	for lag == nil {
		select {
		case m := <-sk.seen:
			if m.Kind != alert.KindFault {
				continue
			}
			var f alert.Fault
			require.NoError(t, json.Unmarshal(m.Data, &f))
			if f.Fault == alert.FaultProcessingLag && f.Active {
				lag = &f
				v, err := metrics.Values(reg, "stillwater_frame_age_seconds", "camera")
				require.NoError(t, err)
				age = v["demo"]
			}
		case err := <-done:
			t.Fatalf("the clip ended without processing_lag: %v", err)
		case <-deadline:
			t.Fatal("no processing_lag within 60 s")
		}
	}
	// The fault comes with the first late frame; the frames behind it are
	// dropped as the reader catches up, just after.
	var dropped float64
	require.Eventually(t, func() bool {
		v, err := metrics.Values(reg, "stillwater_frames_dropped_total", "camera")
		if err != nil {
			return false
		}
		dropped = v["demo"]
		return dropped > 0
	}, 10*time.Second, 50*time.Millisecond, "frames too late to search are dropped and counted")
	cancel()
	require.NoError(t, <-done)
	assert.Contains(t, lag.Message, "after it was taken")
	assert.Greater(t, age, watch.MaxFrameAge.Seconds(), "the age metric shows the late frame")
	refdata.Report(t, "lag: targets taking 1.2 s to hand on: processing_lag raised (%s), frame age %.2f s, %.0f frames dropped", lag.Message, age, dropped)
}
