package main

import (
	"context"
	"encoding/base64"
	"fmt"
	"log/slog"
	"net"
	"net/http"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"
	"github.com/prometheus/client_golang/prometheus"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"stillwater/alert"
	"stillwater/alert/arming"
	"stillwater/alert/bus"
	"stillwater/cmd/stillwater/internal/config"
	"stillwater/cmd/stillwater/internal/daemon"
	"stillwater/cmd/stillwater/internal/demo"
	"stillwater/cmd/stillwater/internal/metrics"
	"stillwater/cmd/stillwater/internal/pipeline"
	"stillwater/cmd/stillwater/internal/testkit"
	"stillwater/cmd/stillwater/internal/tuning"
	"stillwater/vision/refdata"
	"stillwater/vision/synth"
)

// Fault injection on the daemon's bus side, through openBus as serve
// uses it: what the log, /readyz and /metrics say.

func hasProblem(problems []string, parts ...string) bool {
	for _, p := range problems {
		all := true
		for _, s := range parts {
			all = all && strings.Contains(p, s)
		}
		if all {
			return true
		}
	}
	return false
}

// TestStreamOverlapIsALoudFault gives the daemon a stream it cannot
// create: a data directory whose server already has the stream under
// another name (bus.stream.name changed), and an external server where
// someone else's stream holds the same subjects. Either way the log has
// an ERROR naming both streams, the subjects and the setting to change
// (the stream name back, or another subject prefix rather than take over
// someone else's stream),
// /readyz is 503 with the reason, and stillwater_bus_fault{reason="stream"}
// is 1; removing the other stream clears all three without a restart.
func TestStreamOverlapIsALoudFault(t *testing.T) {
	type setup struct {
		cfg   config.Config
		other string
		key   string                                 // the setting the fix names
		fix   func(t *testing.T, b *config.BusParts) // removes the other stream
	}
	cases := []struct {
		name    string
		prepare func(t *testing.T) setup
	}{
		{"bus.stream.name changed on an existing data directory", func(t *testing.T) setup {
			cfg := testkit.BusConfig(t)
			first := testkit.OpenBus(t, cfg, slog.New(slog.DiscardHandler), config.BusHooks{})
			first.Close()
			cfg.Bus.Stream.Name = "POOL"
			return setup{cfg: cfg, other: "STILLWATER", key: "bus.stream.name", fix: func(t *testing.T, b *config.BusParts) {
				nc, err := nats.Connect(b.Embedded.URL())
				require.NoError(t, err)
				defer nc.Close()
				js, err := jetstream.New(nc)
				require.NoError(t, err)
				require.NoError(t, js.DeleteStream(context.Background(), "STILLWATER"))
			}}
		}},
		{"external server with another stream on the subjects", func(t *testing.T) setup {
			emb, err := bus.StartEmbedded(bus.EmbeddedConfig{Listen: "127.0.0.1:-1", StoreDir: t.TempDir(), Name: "external"})
			require.NoError(t, err)
			t.Cleanup(emb.Shutdown)
			nc, err := nats.Connect(emb.URL())
			require.NoError(t, err)
			t.Cleanup(nc.Close)
			js, err := jetstream.New(nc)
			require.NoError(t, err)
			_, err = js.CreateStream(context.Background(), jetstream.StreamConfig{Name: "HOUSE", Subjects: []string{"sw.>"}})
			require.NoError(t, err)
			cfg := testkit.BusConfig(t)
			cfg.Bus.Listen, cfg.Bus.URL = "", emb.URL()
			return setup{cfg: cfg, other: "HOUSE", key: "bus.subject_prefix", fix: func(t *testing.T, _ *config.BusParts) {
				require.NoError(t, js.DeleteStream(context.Background(), "HOUSE"))
			}}
		}},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			s := c.prepare(t)
			mine := s.cfg.Bus.Stream.Name
			if mine == "" {
				mine = "STILLWATER"
			}
			var logs syncBuffer
			b := testkit.OpenBus(t, s.cfg, slog.New(slog.NewTextHandler(&logs, nil)), config.BusHooks{})
			reg := prometheus.NewRegistry()
			metrics.RegisterBusMetrics(reg, b, time.Now)
			testkit.RunBus(t, b)

			var errLine string
			for _, l := range strings.Split(logs.String(), "\n") {
				if strings.Contains(l, "level=ERROR") && strings.Contains(l, mine) {
					errLine = l
				}
			}
			require.NotEmpty(t, errLine, "no ERROR naming stream %s in the log:\n%s", mine, logs.String())
			assert.Contains(t, errLine, s.other)
			assert.Contains(t, errLine, "sw.*.target")
			assert.Contains(t, errLine, s.key)

			problems := b.Problems(time.Now())
			t.Logf("log: %s\nreadiness: %q", errLine, problems)
			assert.True(t, hasProblem(problems, mine, s.other, s.key), "readiness %q", problems)
			v, ok := testkit.MetricValue(t, reg, "stillwater_bus_fault", map[string]string{"reason": "stream"})
			assert.True(t, ok, "no stillwater_bus_fault{reason=\"stream\"}")
			assert.Equal(t, 1.0, v)

			s.fix(t, b)
			fixed := time.Now()
			require.Eventually(t, func() bool { return len(b.Problems(time.Now())) == 0 }, 30*time.Second, 50*time.Millisecond,
				"the fault did not clear after the other stream was removed")
			took := time.Since(fixed)
			v, _ = testkit.MetricValue(t, reg, "stillwater_bus_fault", map[string]string{"reason": "stream"})
			assert.Zero(t, v)
			refdata.Report(t, "stream overlap (%s): fault cleared %.2f s after the other stream was removed", c.name, took.Seconds())
		})
	}
}

// TestBusMetricsCountAcknowledgedApartFromQueued publishes three targets
// while the server is down and checks that they count as queued, not as
// published, until the server acknowledges them; publish_seconds observes
// each message once, from Publish to the acknowledgement.
func TestBusMetricsCountAcknowledgedApartFromQueued(t *testing.T) {
	l, err := net.Listen("tcp", "127.0.0.1:0")
	require.NoError(t, err)
	port := l.Addr().(*net.TCPAddr).Port
	require.NoError(t, l.Close())
	cfg := testkit.BusConfig(t)
	cfg.Bus.Listen, cfg.Bus.URL = "", "nats://127.0.0.1:"+strconv.Itoa(port)

	reg := prometheus.NewRegistry()
	met := metrics.New(reg, "test")
	b := testkit.OpenBus(t, cfg, slog.New(slog.DiscardHandler), config.BusHooks{OnResult: met.BusResult})
	metrics.RegisterBusMetrics(reg, b, time.Now)
	testkit.RunBus(t, b)
	sink := &daemon.BusSink{Pub: b.Pub, Met: met}
	for i := 0; i < 3; i++ {
		require.NoError(t, sink.Send(context.Background(), pipeline.Message{Camera: "north", Kind: alert.KindTarget, ID: fmt.Sprintf("q-%d", i),
			Data: []byte(fmt.Sprintf(`{"v":1,"kind":"target","camera":"north","seq":%d}`, i))}))
	}
	target := map[string]string{"camera": "north", "kind": alert.KindTarget}
	value := func(name string, labels map[string]string) float64 {
		v, _ := testkit.MetricValue(t, reg, name, labels)
		return v
	}
	assert.Zero(t, value("stillwater_messages_published_total", target), "queued messages counted as published")
	assert.Zero(t, value("stillwater_messages_acknowledged_total", target))
	// The three targets and the start-up armed message of camera north.
	require.Eventually(t, func() bool { return b.Pub.Stats().Depth == 4 }, 5*time.Second, 10*time.Millisecond)
	assert.Equal(t, 4.0, value("stillwater_messages_queued_total", nil))
	assert.Zero(t, value("stillwater_publish_seconds", map[string]string{"kind": alert.KindTarget}), "publish_seconds observed before any acknowledgement")
	// The same queue seen 31 s later: older than the 30 s bound, not ready.
	assert.True(t, hasProblem(b.Problems(time.Now().Add(31*time.Second)), "oldest queued message"), "%q", b.Problems(time.Now().Add(31*time.Second)))
	v, _ := testkit.MetricValue(t, reg, "stillwater_outbox_oldest_age_seconds", nil)
	assert.Greater(t, v, 0.0)

	emb, err := bus.StartEmbedded(bus.EmbeddedConfig{Listen: "127.0.0.1:" + strconv.Itoa(port), StoreDir: t.TempDir(), Name: "late"})
	require.NoError(t, err)
	defer emb.Shutdown()
	require.Eventually(t, func() bool { return b.Pub.Stats().Depth == 0 }, 20*time.Second, 20*time.Millisecond)
	assert.Equal(t, 3.0, value("stillwater_messages_acknowledged_total", target))
	assert.Equal(t, 1.0, value("stillwater_messages_acknowledged_total", map[string]string{"camera": "north", "kind": alert.KindArmed}))
	assert.Equal(t, 3.0, value("stillwater_messages_published_total", target))
	assert.Equal(t, 3.0, value("stillwater_publish_seconds", map[string]string{"kind": alert.KindTarget}), "one observation per message")
	assert.Empty(t, b.Problems(time.Now()))
}

// TestSecondDaemonStopsAtTheDataDirectory starts the bus side twice on one
// data directory: the second must be refused by the data directory's lock
// before it starts a server on the first one's JetStream store.
func TestSecondDaemonStopsAtTheDataDirectory(t *testing.T) {
	cfg := testkit.BusConfig(t)
	first := testkit.OpenBus(t, cfg, slog.New(slog.DiscardHandler), config.BusHooks{})
	defer first.Close()
	var logs syncBuffer
	_, err := config.OpenBus(context.Background(), cfg, arming.Config{Cameras: []string{"north"}}, time.Now, slog.New(slog.NewTextHandler(&logs, nil)), config.BusHooks{})
	require.Error(t, err)
	assert.Contains(t, err.Error(), "data_dir "+cfg.DataDir)
	assert.Contains(t, err.Error(), "another stillwater")
	assert.NotContains(t, logs.String(), "embedded bus started", "the second daemon opened the store before it was refused")
}

// TestPoisonedOutboxAfterPrefixChange leaves three targets in the outbox
// of a data directory under bus.subject_prefix "old" (the server was
// down), then starts again with "sw": no stream holds the old subjects.
// A new target must reach a subscriber at once, the old ones must go to
// data_dir/outbox/dead-letter.jsonl, counted, and the log must say so.
func TestPoisonedOutboxAfterPrefixChange(t *testing.T) {
	l, err := net.Listen("tcp", "127.0.0.1:0")
	require.NoError(t, err)
	dead := "nats://" + l.Addr().String()
	require.NoError(t, l.Close())
	cfg := testkit.BusConfig(t)
	cfg.Bus.Listen, cfg.Bus.URL, cfg.Bus.Prefix = "", dead, "old"
	first := testkit.OpenBus(t, cfg, slog.New(slog.DiscardHandler), config.BusHooks{})
	for i := 0; i < 3; i++ {
		require.NoError(t, first.Pub.Publish(context.Background(), "north", alert.KindTarget, fmt.Sprintf("left-%d", i),
			[]byte(fmt.Sprintf(`{"v":1,"kind":"target","camera":"north","seq":%d}`, i))))
	}
	require.Equal(t, 3, first.Pub.Stats().Depth)
	first.Close()

	cfg.Bus.Listen, cfg.Bus.URL, cfg.Bus.Prefix = "127.0.0.1:-1", "", "sw"
	var logs syncBuffer
	reg := prometheus.NewRegistry()
	met := metrics.New(reg, "test")
	b := testkit.OpenBus(t, cfg, slog.New(slog.NewTextHandler(&logs, nil)), config.BusHooks{OnResult: met.BusResult})
	metrics.RegisterBusMetrics(reg, b, time.Now)
	sub, err := nats.Connect(b.Embedded.URL())
	require.NoError(t, err)
	defer sub.Close()
	got := make(chan time.Time, 1)
	_, err = sub.Subscribe("sw.north.target", func(*nats.Msg) {
		select {
		case got <- time.Now():
		default:
		}
	})
	require.NoError(t, err)
	require.NoError(t, sub.Flush())
	testkit.RunBus(t, b)

	sink := &daemon.BusSink{Pub: b.Pub, Met: met}
	start := time.Now()
	require.NoError(t, sink.Send(context.Background(), pipeline.Message{Camera: "north", Kind: alert.KindTarget, ID: "fresh",
		Data: []byte(`{"v":1,"kind":"target","camera":"north","seq":9}`)}))
	var arrived time.Time
	select {
	case arrived = <-got:
	case <-time.After(30 * time.Second):
		t.Fatalf("the new target never arrived: %+v", b.Pub.Stats())
	}
	require.Eventually(t, func() bool { return b.Pub.Stats().Depth == 0 }, 30*time.Second, 20*time.Millisecond)
	emptied := time.Since(start)

	v, _ := testkit.MetricValue(t, reg, "stillwater_messages_dead_lettered_total", nil)
	assert.Equal(t, 3.0, v)
	b2, err := os.ReadFile(filepath.Join(cfg.DataDir, "outbox", bus.DeadLetterFile))
	require.NoError(t, err)
	assert.Equal(t, 3, strings.Count(string(b2), "\n"))
	assert.Equal(t, 3, strings.Count(string(b2), `"subject":"old.north.target"`))
	assert.Contains(t, logs.String(), "level=ERROR msg=\"message moved to the dead-letter file\"")
	assert.Empty(t, b.Problems(time.Now()))
	refdata.Report(t, "daemon restarted with another bus.subject_prefix over 3 queued targets: a new target reached a subscriber %.1f ms after it was handed over; the 3 old ones dead-lettered, outbox empty %.2f s after",
		float64(arrived.Sub(start).Microseconds())/1000, emptied.Seconds())
}

// TestDaemonStartsOverAnEmptySubjectRecord puts an outbox record with an
// empty subject ahead of a good one in the data directory and runs the
// whole daemon: it must start (no panic), set the bad record aside in
// outbox.log.rejected, deliver the good record, and go on raising its
// camera's target.
func TestDaemonStartsOverAnEmptySubjectRecord(t *testing.T) {
	if testing.Short() {
		t.Skip("renders a 10 s clip")
	}
	truth, clip, dir := renderScene(t, "child", 3, func(s *synth.Scene) { s.Width, s.Height, s.Duration = 320, 240, 10; tuning.FloatingChild(s) })
	cfg := demo.Config(truth, clip, dir, false)
	cfg.Cameras[0].Loop = true
	cfg.Cameras[0].Detect.ProcessWidth = 160
	require.NoError(t, cfg.Validate())
	outbox := filepath.Join(cfg.DataDir, "outbox")
	require.NoError(t, os.MkdirAll(outbox, 0o750))
	fault := `{"v":1,"kind":"fault","camera":"demo","seq":1,"time":"2026-12-02T00:00:00Z","fault":"camera_lost","message":"m","active":true}`
	payload := base64.StdEncoding.EncodeToString([]byte(fault))
	log := `{"n":1,"id":"left-bad","subj":"","kind":"fault","at":"2026-12-02T00:00:00Z","data":"` + payload + `"}` + "\n" +
		`{"n":2,"id":"left-good","subj":"stillwater.demo.fault","kind":"fault","at":"2026-12-02T00:00:00Z","data":"` + payload + `"}` + "\n"
	require.NoError(t, os.WriteFile(filepath.Join(outbox, "outbox.log"), []byte(log), 0o640))

	bus, stop := startDaemon(t, cfg)
	nc, err := nats.Connect(bus.URL)
	require.NoError(t, err)
	defer nc.Close()
	js, err := jetstream.New(nc)
	require.NoError(t, err)
	require.Eventually(t, func() bool { return streamHasID(js, "STILLWATER", "left-good") }, 10*time.Second, 50*time.Millisecond,
		"the good outbox record was not delivered")
	require.Eventually(t, func() bool { return len(bus.bySubject("stillwater.demo.target")) > 0 }, 60*time.Second, 100*time.Millisecond,
		"the camera raised no target")
	rej, err := os.ReadFile(filepath.Join(outbox, "outbox.log.rejected"))
	require.NoError(t, err)
	assert.Contains(t, string(rej), `"line":1`)
	assert.Contains(t, string(rej), "empty subject")
	assert.Contains(t, string(rej), "left-bad")
	require.Eventually(t, func() bool { code, _ := httpGet(t, "http://"+bus.HTTP+"/readyz"); return code == http.StatusOK }, 10*time.Second, 100*time.Millisecond)
	require.NoError(t, stop())
}

// streamHasID reports whether the stream holds a message with the
// de-duplication id.
func streamHasID(js jetstream.JetStream, stream, id string) bool {
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Second)
	defer cancel()
	st, err := js.Stream(ctx, stream)
	if err != nil {
		return false
	}
	info, err := st.Info(ctx)
	if err != nil {
		return false
	}
	for seq := info.State.FirstSeq; info.State.Msgs > 0 && seq <= info.State.LastSeq; seq++ {
		m, err := st.GetMsg(ctx, seq)
		if err == nil && m.Header.Get(jetstream.MsgIDHeader) == id {
			return true
		}
	}
	return false
}
