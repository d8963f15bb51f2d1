package main

import (
	"bytes"
	"context"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"stillwater/alert"
	"stillwater/alert/bus"
)

// syncBuffer is a bytes.Buffer safe to read while runListen writes.
type syncBuffer struct {
	mu sync.Mutex
	b  bytes.Buffer
}

func (s *syncBuffer) Write(p []byte) (int, error) {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.b.Write(p)
}

func (s *syncBuffer) String() string {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.b.String()
}

func listenBus(t *testing.T) (*bus.Embedded, *nats.Conn) {
	t.Helper()
	emb, err := bus.StartEmbedded(bus.EmbeddedConfig{Listen: "127.0.0.1:-1", StoreDir: t.TempDir(), Prefix: "sw",
		Users: []bus.User{{Name: "daemon", Password: "d-pass", Role: bus.RoleDaemon}, {Name: "resp", Password: "r-pass", Role: bus.RoleResponder}}})
	require.NoError(t, err)
	t.Cleanup(emb.Shutdown)
	nc, err := nats.Connect(emb.URL(), nats.UserInfo("daemon", "d-pass"))
	require.NoError(t, err)
	t.Cleanup(nc.Close)
	return emb, nc
}

// startListen runs runListen until it returns and waits until it is
// subscribed.
func startListen(t *testing.T, args ...string) (out, errb *syncBuffer, done chan error) {
	t.Helper()
	out, errb, done = &syncBuffer{}, &syncBuffer{}, make(chan error, 1)
	ctx, cancel := context.WithTimeout(context.Background(), 20*time.Second)
	t.Cleanup(cancel)
	go func() { done <- runListen(ctx, args, out, errb) }()
	require.Eventually(t, func() bool { return strings.Contains(errb.String(), "listening on ") }, 10*time.Second, 10*time.Millisecond,
		"stderr: %s", errb.String())
	return out, errb, done
}

func publishJSON(t *testing.T, nc *nats.Conn, camera, kind string, m any) {
	t.Helper()
	b, err := alert.Encode(m)
	require.NoError(t, err)
	require.NoError(t, nc.Publish(alert.Subject("sw", camera, kind), b))
}

func listenExamples() (alert.Target, alert.Cleared, alert.Fault, alert.ArmedChange, alert.Heartbeat) {
	t0 := time.Date(2026, 6, 10, 16, 30, 0, 250_000_000, time.UTC)
	until := time.Date(2026, 6, 10, 18, 30, 0, 0, time.UTC)
	return alert.Target{V: alert.Version, Kind: alert.KindTarget, Camera: "north", Track: 7, Seq: 42, Event: "start",
			Time: t0, FrameTime: t0, Frame: 1234, Surface: alert.Position{X: 3.25, Y: 1.5},
			Floor: alert.FloorPosition{X: 3.1, Y: 1.45, Depth: 1.2}, Area: 0.18, Velocity: alert.Velocity{X: 0.4, Y: -0.1},
			Dwell: 0.8, Confidence: 0.857, Evidence: "north-000042.jpg"},
		alert.Cleared{V: alert.Version, Kind: alert.KindCleared, Camera: "north", Track: 7, Seq: 43, Time: t0.Add(5 * time.Second),
			FrameTime: t0, Frame: 1284, Last: alert.Position{X: 4, Y: 2.5}, Duration: 4.5},
		alert.NewDriftFault("north", 44, t0, true, 0.35),
		alert.ArmedChange{V: alert.Version, Kind: alert.KindArmed, Camera: "north", Time: t0, Armed: false,
			Reason: "disarmed by override until 2026-06-10T18:30:00Z (set by http:alice)", Until: &until, By: "http:alice"},
		alert.Heartbeat{V: alert.Version, Kind: alert.KindBeat, Camera: "north", Time: t0, FPS: 9.8, CameraOK: true, Armed: true, Version: "0.3.0"}
}

func TestListenPrintsOneLinePerMessage(t *testing.T) {
	_, nc := listenBus(t)
	t.Setenv("SW_LISTEN_TEST_PW", "r-pass")
	out, errb, done := startListen(t, "-url", nc.ConnectedUrl(), "-prefix", "sw", "-n", "5", "-user", "resp", "-password-env", "SW_LISTEN_TEST_PW")
	tg, cl, fa, ar, hb := listenExamples()
	publishJSON(t, nc, "north", alert.KindTarget, tg)
	publishJSON(t, nc, "north", alert.KindCleared, cl)
	require.NoError(t, nc.Publish("sw.north.target", []byte("not json")))
	publishJSON(t, nc, "north", alert.KindFault, fa)
	publishJSON(t, nc, "north", alert.KindArmed, ar)
	publishJSON(t, nc, "north", alert.KindBeat, hb)
	require.NoError(t, nc.Flush())
	require.NoError(t, <-done)
	want := []string{
		"2026-06-10 16:30:00.250Z north target start track=7 seq=42 surface=3.25,1.50m floor=3.10,1.45m depth=1.20m area=0.180m2 velocity=0.40,-0.10m/s dwell=0.8s confidence=0.86 evidence=north-000042.jpg",
		"2026-06-10 16:30:05.250Z north cleared track=7 seq=43 last=4.00,2.50m lasted=4.5s",
		"2026-06-10 16:30:00.250Z north fault calibration_drift RAISED seq=44 shift=0.35m: the pool corners no longer match the calibration: positions are off, recalibrate: corners moved 0.35 m",
		"2026-06-10 16:30:00.250Z north DISARMED: disarmed by override until 2026-06-10T18:30:00Z (set by http:alice) until=2026-06-10T18:30:00Z by=http:alice",
		"2026-06-10 16:30:00.250Z north heartbeat fps=9.8 camera_ok=true armed=true version=0.3.0",
	}
	assert.Equal(t, want, strings.Split(strings.TrimSpace(out.String()), "\n"))
	assert.Contains(t, errb.String(), `sw.north.target: unreadable message`)
	assert.Contains(t, errb.String(), "listening on sw.*.> at")
}

func TestListenJSONAndFilters(t *testing.T) {
	_, nc := listenBus(t)
	t.Setenv("SW_LISTEN_TEST_PW", "r-pass")
	out, _, done := startListen(t, "-url", nc.ConnectedUrl(), "-prefix", "sw", "-camera", "north", "-kind", "fault", "-json", "-n", "1",
		"-user", "resp", "-password-env", "SW_LISTEN_TEST_PW")
	tg, _, fa, _, _ := listenExamples()
	publishJSON(t, nc, "north", alert.KindTarget, tg) // filtered out by -kind
	other := fa
	other.Camera = "south"
	publishJSON(t, nc, "south", alert.KindFault, other) // filtered out by -camera
	publishJSON(t, nc, "north", alert.KindFault, fa)
	require.NoError(t, nc.Flush())
	require.NoError(t, <-done)
	want, err := alert.Encode(fa)
	require.NoError(t, err)
	assert.Equal(t, string(want)+"\n", out.String())
}

func TestListenErrors(t *testing.T) {
	emb, _ := listenBus(t)
	cases := []struct {
		name string
		args []string
		want string
	}{
		{"bad kind", []string{"-kind", "gossip"}, `-kind "gossip"`},
		{"bad camera", []string{"-camera", "a.b"}, "-camera"},
		{"wrong password", []string{"-url", emb.URL(), "-user", "resp", "-password-env", "SW_LISTEN_WRONG"}, "connect"},
		{"unset password variable", []string{"-url", emb.URL(), "-user", "resp", "-password-env", "SW_LISTEN_UNSET"}, "SW_LISTEN_UNSET is empty or unset"},
		{"missing creds", []string{"-url", emb.URL(), "-creds", "/nonexistent/listen.creds"}, "creds file"},
	}
	t.Setenv("SW_LISTEN_WRONG", "nope")
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			var out, errb bytes.Buffer
			err := runListen(context.Background(), c.args, &out, &errb)
			require.Error(t, err)
			assert.Contains(t, err.Error(), c.want)
			assert.Empty(t, out.String())
		})
	}
}
