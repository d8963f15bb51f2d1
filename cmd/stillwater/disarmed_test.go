package main

import (
	"context"
	"encoding/json"
	"fmt"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"stillwater/alert"
)

// TestDisarmedPublishesNoTarget runs the child scene while the schedule
// has the pool disarmed: the armed message says so, frames are still
// processed, and no target goes out.
func TestDisarmedPublishesNoTarget(t *testing.T) {
	if testing.Short() {
		t.Skip("renders a 20 s clip")
	}
	truth, clip, dir := renderScene(t, "child", 7, nil)
	cfg := demoConfig(truth, clip, dir, false)
	// A one-hour window that starts two hours from now: disarmed now.
	from := time.Now().UTC().Add(2 * time.Hour)
	cfg.Arming = ArmingConfig{TimeZone: "UTC", Schedule: []string{
		fmt.Sprintf("daily %02d:00-%02d:00", from.Hour(), (from.Hour()+1)%24),
	}}
	require.NoError(t, cfg.Validate())

	log, stop := startDaemon(t, cfg)
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
	// The clip plays as fast as the CPU allows; give it time to end.
	time.Sleep(15 * time.Second)
	require.NoError(t, stop())
	assert.Empty(t, log.bySubject("stillwater.demo.target"), "a target while disarmed")
}
