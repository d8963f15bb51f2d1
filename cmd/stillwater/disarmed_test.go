package main

import (
	"context"
	"encoding/json"
	"fmt"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"
	"github.com/prometheus/client_golang/prometheus"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"stillwater/alert"
	"stillwater/cmd/stillwater/internal/config"
	"stillwater/cmd/stillwater/internal/demo"
	"stillwater/cmd/stillwater/internal/testkit"
)

// TestDisarmedPublishesNoTarget runs the child scene while the schedule
// has the pool disarmed: the armed message says so, every frame of the clip
// goes through detection and tracking, the child is being tracked when the
// clip ends (the labels have it in the water from 8 s to the end), and
// still no target goes out. The same clip armed raises its target in
// TestEndToEnd.
func TestDisarmedPublishesNoTarget(t *testing.T) {
	if testing.Short() {
		t.Skip("runs the daemon over a 20 s clip")
	}
	truth, clip, dir := renderScene(t, "child", 7, nil)
	require.NotNil(t, truth.PerFrame[len(truth.PerFrame)-1].Intruder, "the labels have no child in the water at the end")
	cfg := demo.Config(truth, clip, dir, false)
	// A one-hour window that starts two hours from now: disarmed now.
	from := time.Now().UTC().Add(2 * time.Hour)
	cfg.Arming = config.ArmingConfig{TimeZone: "UTC", Schedule: []string{
		fmt.Sprintf("daily %02d:00-%02d:00", from.Hour(), (from.Hour()+1)%24),
	}}
	require.NoError(t, cfg.Validate())

	reg := prometheus.NewRegistry()
	log, stop := startDaemonWith(t, cfg, reg)
	// The start-up armed message may go out before the test subscribes;
	// it is in the stream either way.
	nc, err := nats.Connect(log.URL)
	require.NoError(t, err)
	defer nc.Close()
	js, err := jetstream.New(nc)
	require.NoError(t, err)
	var data []byte
	require.Eventually(t, func() bool {
		ctx, cancel := context.WithTimeout(context.Background(), time.Second)
		defer cancel()
		st, err := js.Stream(ctx, "STILLWATER")
		if err != nil {
			return false
		}
		m, err := st.GetLastMsgForSubject(ctx, "stillwater.demo.armed")
		if err != nil {
			return false
		}
		data = m.Data
		return true
	}, 10*time.Second, 100*time.Millisecond, "no armed message in the stream")
	var a alert.ArmedChange
	require.NoError(t, json.Unmarshal(data, &a))
	assert.False(t, a.Armed)
	assert.Contains(t, a.Reason, "disarmed")

	// The clip plays as fast as the CPU allows; the daemon stops by
	// itself at its end. The gauges hold the last frame's state.
	metric := func(name string) float64 {
		v, _ := testkit.MetricValue(t, reg, name, map[string]string{"camera": "demo"})
		return v
	}
	require.Eventually(t, func() bool { return metric("stillwater_frames_processed_total") >= float64(truth.Frames) },
		2*time.Minute, 100*time.Millisecond, "the daemon did not process the clip")
	assert.Equal(t, float64(truth.Frames), metric("stillwater_frames_processed_total"), "frames through the pipeline")
	assert.Zero(t, metric("stillwater_armed"), "armed gauge")
	assert.GreaterOrEqual(t, metric("stillwater_active_tracks"), 1.0, "no track of the child at the end of the clip: detection did not see it")
	require.NoError(t, stop())
	assert.Empty(t, log.bySubject("stillwater.demo.target"), "a target while disarmed")
}
