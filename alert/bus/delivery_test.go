package bus

import (
	"stillwater/vision/refdata"

	"context"
	"fmt"
	"net"
	"os"
	"path/filepath"
	"strconv"
	"sync"
	"testing"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	"stillwater/alert"
)

// These tests run real nats-server instances in process on loopback.

func freePort(t testing.TB) int {
	t.Helper()
	l, err := net.Listen("tcp", "127.0.0.1:0")
	require.NoError(t, err)
	defer l.Close()
	return l.Addr().(*net.TCPAddr).Port
}

func mustStart(t testing.TB, opts *server.Options) *server.Server {
	t.Helper()
	srv, err := startServer(opts)
	require.NoError(t, err)
	return srv
}

func stop(srv *server.Server) {
	srv.Shutdown()
	srv.WaitForShutdown()
}

// singleNode returns options for one JetStream server on a fixed port, so
// that it can be restarted where clients expect it.
func singleNode(t testing.TB, store string) *server.Options {
	t.Helper()
	opts, err := embeddedOptions(EmbeddedConfig{Listen: "127.0.0.1:" + strconv.Itoa(freePort(t)), StoreDir: store, Name: "single"})
	require.NoError(t, err)
	return opts
}

func connect(t testing.TB, url string, extra ...nats.Option) *nats.Conn {
	t.Helper()
	opts := append([]nats.Option{nats.MaxReconnects(-1), nats.ReconnectWait(200 * time.Millisecond), nats.RetryOnFailedConnect(true)}, extra...)
	nc, err := nats.Connect(url, opts...)
	require.NoError(t, err)
	t.Cleanup(nc.Close)
	return nc
}

func targetJSON(t testing.TB, camera string, seq int, event string) []byte {
	t.Helper()
	at := time.Date(2026, 12, 2, 0, 0, 0, 0, time.UTC).Add(time.Duration(seq) * 100 * time.Millisecond)
	b, err := alert.Encode(alert.Target{V: alert.Version, Kind: alert.KindTarget, Camera: camera, Track: 1, Seq: uint64(seq), Event: event,
		Time: at, FrameTime: at, Frame: seq, Surface: alert.Position{X: 1, Y: 2}, Floor: alert.FloorPosition{X: 1, Y: 2, Depth: 1.2}})
	require.NoError(t, err)
	return b
}

// streamIDs reads every message of the stream through url and counts each
// Nats-Msg-Id.
func streamIDs(t testing.TB, url, stream string) map[string]int {
	t.Helper()
	nc, err := nats.Connect(url)
	require.NoError(t, err)
	defer nc.Close()
	js, err := jetstream.New(nc)
	require.NoError(t, err)
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	s, err := js.Stream(ctx, stream)
	require.NoError(t, err)
	info, err := s.Info(ctx)
	require.NoError(t, err)
	ids := map[string]int{}
	for seq := info.State.FirstSeq; seq <= info.State.LastSeq && info.State.Msgs > 0; seq++ {
		m, err := s.GetMsg(ctx, seq)
		require.NoError(t, err, "seq %d", seq)
		ids[m.Header.Get(jetstream.MsgIDHeader)]++
	}
	return ids
}

func waitDrained(t testing.TB, p *Publisher, within time.Duration) time.Duration {
	t.Helper()
	start := time.Now()
	require.Eventually(t, func() bool { return p.Stats().Depth == 0 }, within, 50*time.Millisecond,
		"outbox not drained: %+v", p.Stats())
	return time.Since(start)
}

func exactlyOnce(t testing.TB, ids map[string]int, sent []string) (lost, dup int) {
	t.Helper()
	for _, id := range sent {
		switch n := ids[id]; {
		case n == 0:
			lost++
		case n > 1:
			dup += n - 1
		}
	}
	assert.Zero(t, lost, "messages lost")
	assert.Zero(t, dup, "messages duplicated")
	assert.Len(t, ids, len(sent), "stream holds messages that were not sent")
	return lost, dup
}

// TestOutageLosesNothing stops the server for a minute while targets are
// published at 10 per second, restarts it on the same port and store, and
// checks that the stream holds every message exactly once.
func TestOutageLosesNothing(t *testing.T) {
	if testing.Short() {
		t.Skip("60 s outage")
	}
	outage := 60 * time.Second
	if s := os.Getenv("STILLWATER_OUTAGE"); s != "" { // shorter runs while developing
		d, err := time.ParseDuration(s)
		require.NoError(t, err)
		outage = d
	}
	opts := singleNode(t, t.TempDir())
	srv := mustStart(t, opts)
	url := srv.ClientURL()
	nc := connect(t, url)
	var maxBlock time.Duration
	var mu sync.Mutex
	var backlog []bool
	var maxDirect, maxQueued time.Duration
	p, err := NewPublisherWith(context.Background(), nc, PublisherConfig{Prefix: "sw", Outbox: OutboxConfig{Dir: t.TempDir()},
		OnBacklog: func(active bool, _ Stats) { mu.Lock(); backlog = append(backlog, active); mu.Unlock() },
		OnResult: func(r PublishResult) {
			mu.Lock()
			defer mu.Unlock()
			if r.Outboxed && r.Latency > maxQueued {
				maxQueued = r.Latency
			} else if !r.Outboxed && r.Latency > maxDirect {
				maxDirect = r.Latency
			}
		}})
	require.NoError(t, err)
	defer p.Close()
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	go p.Run(ctx)

	var sent []string
	publishFor := func(d time.Duration) {
		end := time.Now().Add(d)
		tick := time.NewTicker(100 * time.Millisecond)
		defer tick.Stop()
		for time.Now().Before(end) {
			<-tick.C
			i := len(sent)
			id := fmt.Sprintf("outage-%d", i)
			t0 := time.Now()
			require.NoError(t, p.Publish(ctx, "north", alert.KindTarget, id, targetJSON(t, "north", i, "start")))
			if d := time.Since(t0); d > maxBlock {
				maxBlock = d
			}
			sent = append(sent, id)
		}
	}
	publishFor(3 * time.Second)
	stopped := time.Now()
	stop(srv)
	publishFor(outage)
	depthAtRestart := p.Stats().Depth
	srv = mustStart(t, opts)
	defer stop(srv)
	restarted := time.Now()
	drain := waitDrained(t, p, 60*time.Second)
	publishFor(3 * time.Second)
	waitDrained(t, p, 30*time.Second)

	ids := streamIDs(t, url, "STILLWATER")
	lost, dup := exactlyOnce(t, ids, sent)
	st := p.Stats()
	refdata.Report(t, "outage %.1f s; sent %d, in stream %d, lost %d, duplicated %d; outbox depth at restart %d, drained %.2f s after the restart; longest Publish call %v; stats %+v",
		restarted.Sub(stopped).Seconds(), len(sent), len(ids), lost, dup, depthAtRestart, drain.Seconds(), maxBlock, st)
	mu.Lock()
	t.Logf("publish latency: longest acknowledged directly %v, longest through the outbox %v; backlog transitions %v", maxDirect, maxQueued, backlog)
	assert.Equal(t, []bool{true, false}, backlog, "bus_backlog raised once and cleared once")
	mu.Unlock()
	assert.Greater(t, depthAtRestart, 0, "the outage should have queued messages")
	assert.Zero(t, st.Lost())
}

// TestOutboxSurvivesRestart closes a publisher with messages queued while
// the server is down; a new publisher on the same outbox directory, made
// while the server is still down, delivers them once it is back.
func TestOutboxSurvivesRestart(t *testing.T) {
	opts := singleNode(t, t.TempDir())
	srv := mustStart(t, opts)
	url := srv.ClientURL()
	dir := t.TempDir()

	nc1 := connect(t, url)
	p1, err := NewPublisherWith(context.Background(), nc1, PublisherConfig{Prefix: "sw", Outbox: OutboxConfig{Dir: dir}})
	require.NoError(t, err)
	var sent []string
	pub := func(p *Publisher, n int) {
		for i := 0; i < n; i++ {
			id := fmt.Sprintf("restart-%d", len(sent))
			require.NoError(t, p.Publish(context.Background(), "north", alert.KindCleared, id, targetJSON(t, "north", len(sent), "start")))
			sent = append(sent, id)
		}
	}
	pub(p1, 5)
	assert.Equal(t, 0, p1.Stats().Depth)
	stop(srv)
	require.Eventually(t, func() bool { return nc1.Status() != nats.CONNECTED }, 5*time.Second, 10*time.Millisecond)
	pub(p1, 20)
	assert.Equal(t, 20, p1.Stats().Depth)
	require.NoError(t, p1.Close())
	nc1.Close()

	// A second publisher on the same directory while the first holds it
	// would reorder messages; it is refused.
	p1b, err := NewPublisherWith(context.Background(), connect(t, url), PublisherConfig{Prefix: "sw", Outbox: OutboxConfig{Dir: dir}})
	require.NoError(t, err, "the lock is released by Close")

	require.NoError(t, p1b.Close())
	nc2 := connect(t, url)
	p2, err := NewPublisherWith(context.Background(), nc2, PublisherConfig{Prefix: "sw", Outbox: OutboxConfig{Dir: dir}})
	require.NoError(t, err)
	defer p2.Close()
	assert.Equal(t, 20, p2.Stats().Depth, "queued messages reloaded from disk")
	_, err = NewPublisherWith(context.Background(), nc2, PublisherConfig{Prefix: "sw", Outbox: OutboxConfig{Dir: dir}})
	assert.ErrorContains(t, err, "another process holds it")

	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	go p2.Run(ctx)
	srv = mustStart(t, opts)
	defer stop(srv)
	waitDrained(t, p2, 30*time.Second)
	ids := streamIDs(t, url, "STILLWATER")
	lost, dup := exactlyOnce(t, ids, sent)
	refdata.Report(t, "sent %d (20 through a restart), in stream %d, lost %d, duplicated %d", len(sent), len(ids), lost, dup)
}

func TestOutboxOverflowPolicy(t *testing.T) {
	ob, err := openOutbox(OutboxConfig{Dir: t.TempDir(), MaxMessages: 4})
	require.NoError(t, err)
	defer ob.close()
	push := func(id string, low bool) error {
		_, err := ob.push(outboxRecord{ID: id, Subject: "sw.n." + alert.KindTarget, Kind: alert.KindTarget, Low: low, Data: []byte(`{"id":"` + id + `"}`)})
		return err
	}
	require.NoError(t, push("start", false))
	require.NoError(t, push("u1", true))
	require.NoError(t, push("u2", true))
	require.NoError(t, push("cleared", false))
	require.NoError(t, push("fault", false)) // drops u1, the oldest low-priority one
	require.NoError(t, push("armed", false)) // drops u2
	err = push("fault2", false)              // nothing low left: refused
	require.ErrorIs(t, err, ErrOutboxFull)
	st := ob.stats()
	assert.Equal(t, uint64(2), st.dropped)
	assert.Equal(t, uint64(1), st.refused)
	var ids []string
	for _, r := range ob.live {
		ids = append(ids, r.ID)
	}
	assert.Equal(t, []string{"start", "cleared", "fault", "armed"}, ids)

	// The same queue comes back from disk, order kept, drops remembered.
	h, _ := ob.head()
	require.NoError(t, ob.remove(h.N))
	require.NoError(t, ob.close())
	ob2, err := openOutbox(OutboxConfig{Dir: ob.cfg.Dir, MaxMessages: 4})
	require.NoError(t, err)
	defer ob2.close()
	ids = nil
	for _, r := range ob2.live {
		ids = append(ids, r.ID)
	}
	assert.Equal(t, []string{"cleared", "fault", "armed"}, ids)
}

func TestOutboxTornLastLine(t *testing.T) {
	dir := t.TempDir()
	ob, err := openOutbox(OutboxConfig{Dir: dir})
	require.NoError(t, err)
	_, err = ob.push(outboxRecord{ID: "a", Subject: "sw.n.target", Kind: alert.KindTarget, Data: []byte(`{"v":1}`)})
	require.NoError(t, err)
	require.NoError(t, ob.close())
	f, err := os.OpenFile(filepath.Join(dir, "outbox.log"), os.O_APPEND|os.O_WRONLY, 0)
	require.NoError(t, err)
	_, err = f.WriteString(`{"n":2,"id":"b","subj":"sw.n.tar`) // crash mid-append
	require.NoError(t, err)
	require.NoError(t, f.Close())
	ob2, err := openOutbox(OutboxConfig{Dir: dir})
	require.NoError(t, err)
	defer ob2.close()
	require.Len(t, ob2.live, 1)
	assert.Equal(t, "a", ob2.live[0].ID)
	require.Len(t, ob2.rejected, 1, "the torn line is set aside, not silently dropped")
	assert.True(t, ob2.rejected[0].Torn)
	assert.Equal(t, 2, ob2.rejected[0].Line)
}

func TestHeartbeatDroppedWhileDown(t *testing.T) {
	opts := singleNode(t, t.TempDir())
	srv := mustStart(t, opts)
	nc := connect(t, srv.ClientURL())
	p, err := NewPublisherWith(context.Background(), nc, PublisherConfig{Prefix: "sw", Outbox: OutboxConfig{Dir: t.TempDir()}})
	require.NoError(t, err)
	defer p.Close()
	require.NoError(t, p.Publish(context.Background(), "north", alert.KindBeat, "", []byte(`{}`)))
	stop(srv)
	require.Eventually(t, func() bool { return nc.Status() != nats.CONNECTED }, 5*time.Second, 10*time.Millisecond)
	err = p.Publish(context.Background(), "north", alert.KindBeat, "", []byte(`{}`))
	assert.ErrorIs(t, err, ErrNotConnected)
	st := p.Stats()
	assert.Equal(t, uint64(1), st.BeatsLost)
	assert.Equal(t, 0, st.Depth, "heartbeats never go to the outbox")
}

// TestClusterFailover runs three JetStream nodes on loopback with the
// stream replicated three ways, stops the stream's leader in the middle of
// a burst and checks that every acknowledged message is in the stream,
// read through a surviving node.
func TestClusterFailover(t *testing.T) {
	if testing.Short() {
		t.Skip("cluster")
	}
	const n = 3
	cports := []int{freePort(t), freePort(t), freePort(t)}
	var routes string
	for i, p := range cports {
		if i > 0 {
			routes += ","
		}
		routes += fmt.Sprintf("nats-route://127.0.0.1:%d", p)
	}
	srvs := make([]*server.Server, n)
	var urls string
	for i := 0; i < n; i++ {
		opts := &server.Options{ServerName: fmt.Sprintf("n%d", i+1), Host: "127.0.0.1", Port: freePort(t), JetStream: true,
			StoreDir: t.TempDir(), NoSigs: true, NoLog: true,
			Cluster: server.ClusterOpts{Name: "sw", Host: "127.0.0.1", Port: cports[i]}, Routes: server.RoutesFromStr(routes)}
		srv, err := server.NewServer(opts)
		require.NoError(t, err)
		srv.Start()
		srvs[i] = srv
		defer stop(srv)
		if i > 0 {
			urls += ","
		}
		urls += srv.ClientURL()
	}
	for _, s := range srvs {
		require.True(t, s.ReadyForConnections(10*time.Second))
	}
	nc := connect(t, urls)
	var p *Publisher
	require.Eventually(t, func() bool {
		var err error
		p, err = NewPublisherWith(context.Background(), nc, PublisherConfig{Prefix: "sw", Stream: StreamConfig{Replicas: 3}})
		return err == nil
	}, 30*time.Second, 250*time.Millisecond, "cluster never accepted the stream")
	defer p.Close()

	var mu sync.Mutex
	acked := map[string]time.Time{}
	p.cfg.OnResult = func(r PublishResult) {
		if r.Err == nil {
			mu.Lock()
			acked[r.ID] = time.Now()
			mu.Unlock()
		}
	}
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	go p.Run(ctx)

	js, _ := jetstream.New(nc)
	leaderOf := func() string {
		s, err := js.Stream(ctx, "STILLWATER")
		require.NoError(t, err)
		info, err := s.Info(ctx)
		require.NoError(t, err)
		return info.Cluster.Leader
	}
	var sent []string
	var stopped time.Time
	survivor := -1
	var leader string
	for i := 0; i < 400; i++ {
		if i == 150 {
			leader = leaderOf()
			for j, s := range srvs {
				if s.Name() == leader {
					stopped = time.Now()
					stop(s)
				} else {
					survivor = j
				}
			}
			require.False(t, stopped.IsZero(), "leader %q not found", leader)
		}
		id := fmt.Sprintf("burst-%d", i)
		require.NoError(t, p.Publish(ctx, "north", alert.KindTarget, id, targetJSON(t, "north", i, "start")))
		sent = append(sent, id)
	}
	waitDrained(t, p, 60*time.Second)

	var failover time.Duration = -1
	mu.Lock()
	for _, at := range acked {
		if at.After(stopped) && (failover < 0 || at.Sub(stopped) < failover) {
			failover = at.Sub(stopped)
		}
	}
	nAcked := len(acked)
	mu.Unlock()
	ids := streamIDs(t, srvs[survivor].ClientURL(), "STILLWATER")
	missing := 0
	for id := range acked {
		if ids[id] == 0 {
			missing++
		}
	}
	assert.Zero(t, missing, "acknowledged messages missing from the stream")
	lost, dup := exactlyOnce(t, ids, sent)
	refdata.Report(t, "leader %s stopped after 150 of %d; acked %d, in stream (via %s) %d, missing acked %d, lost %d, duplicated %d; failover (stop to first ack after) %v; stats %+v",
		leader, len(sent), nAcked, srvs[survivor].Name(), len(ids), missing, lost, dup, failover, p.Stats())
	assert.Greater(t, failover, time.Duration(0), "no acknowledgement after the leader stopped")
}

// BenchmarkPublishAcked measures one acknowledged stream publish on
// loopback, the camera loop's cost per message while the bus is up.
func BenchmarkPublishAcked(b *testing.B) {
	srv := mustStart(b, singleNode(b, b.TempDir()))
	defer stop(srv)
	nc := connect(b, srv.ClientURL())
	p, err := NewPublisherWith(context.Background(), nc, PublisherConfig{Prefix: "sw", Outbox: OutboxConfig{Dir: b.TempDir()}})
	require.NoError(b, err)
	defer p.Close()
	msg := targetJSON(b, "north", 1, "update")
	b.ResetTimer()
	start := time.Now()
	for i := 0; i < b.N; i++ {
		if err := p.Publish(context.Background(), "north", alert.KindTarget, "bench-"+strconv.Itoa(i), msg); err != nil {
			b.Fatal(err)
		}
	}
	b.ReportMetric(float64(time.Since(start).Microseconds())/float64(b.N), "us/ack")
	if st := p.Stats(); st.Depth != 0 {
		b.Fatalf("outbox used while the server was up: %+v", st)
	}
}

// BenchmarkPublishOutboxed measures Publish while the server is down: the
// cost of a synced append to the outbox file.
func BenchmarkPublishOutboxed(b *testing.B) {
	opts := singleNode(b, b.TempDir())
	srv := mustStart(b, opts)
	nc := connect(b, srv.ClientURL())
	p, err := NewPublisherWith(context.Background(), nc, PublisherConfig{Prefix: "sw", Outbox: OutboxConfig{Dir: b.TempDir(), MaxMessages: 1 << 30, MaxBytes: 1 << 40}})
	require.NoError(b, err)
	defer p.Close()
	stop(srv)
	for nc.Status() == nats.CONNECTED {
		time.Sleep(10 * time.Millisecond)
	}
	msg := targetJSON(b, "north", 1, "start")
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		if err := p.Publish(context.Background(), "north", alert.KindTarget, "bench-"+strconv.Itoa(i), msg); err != nil {
			b.Fatal(err)
		}
	}
	b.ReportMetric(float64(p.Stats().Depth)/float64(b.N), "queued/op")
}

func TestStreamConfigApplied(t *testing.T) {
	srv := mustStart(t, singleNode(t, t.TempDir()))
	defer stop(srv)
	nc := connect(t, srv.ClientURL())
	p, err := NewPublisherWith(context.Background(), nc, PublisherConfig{Prefix: "sw",
		Stream: StreamConfig{Name: "POOL", MaxAge: 48 * time.Hour, MaxBytes: 8 << 20, Duplicates: 10 * time.Minute}})
	require.NoError(t, err)
	defer p.Close()
	js, err := jetstream.New(nc)
	require.NoError(t, err)
	s, err := js.Stream(context.Background(), "POOL")
	require.NoError(t, err)
	info, err := s.Info(context.Background())
	require.NoError(t, err)
	assert.Equal(t, 48*time.Hour, info.Config.MaxAge)
	assert.Equal(t, int64(8<<20), info.Config.MaxBytes)
	assert.Equal(t, 10*time.Minute, info.Config.Duplicates)
	assert.Equal(t, jetstream.FileStorage, info.Config.Storage)
	assert.Equal(t, []string{"sw.*.target", "sw.*.cleared", "sw.*.fault", "sw.*.armed"}, info.Config.Subjects)

	// The same id twice is stored once.
	msg := targetJSON(t, "north", 1, "start")
	require.NoError(t, p.Publish(context.Background(), "north", alert.KindTarget, "same", msg))
	require.NoError(t, p.Publish(context.Background(), "north", alert.KindTarget, "same", msg))
	assert.Equal(t, map[string]int{"same": 1}, streamIDs(t, srv.ClientURL(), "POOL"))
}

func TestOversizedMessageIsNotQueued(t *testing.T) {
	opts := singleNode(t, t.TempDir())
	opts.MaxPayload = 1024
	srv := mustStart(t, opts)
	defer stop(srv)
	nc := connect(t, srv.ClientURL())
	var results []PublishResult
	p, err := NewPublisherWith(context.Background(), nc, PublisherConfig{Prefix: "sw", Outbox: OutboxConfig{Dir: t.TempDir()},
		OnResult: func(r PublishResult) { results = append(results, r) }})
	require.NoError(t, err)
	defer p.Close()
	err = p.Publish(context.Background(), "north", alert.KindFault, "big", make([]byte, 2048))
	require.ErrorIs(t, err, nats.ErrMaxPayload, "no resend can fix it, so it fails at once")
	assert.Equal(t, 0, p.Stats().Depth)
	require.Len(t, results, 1)
	assert.Error(t, results[0].Err)
	assert.Equal(t, uint64(1), p.Stats().DeadLettered)
	dl := readDeadLetters(t, filepath.Join(p.cfg.Outbox.Dir, DeadLetterFile))
	require.Len(t, dl, 1)
	assert.Equal(t, "big", dl[0].ID)
	assert.Len(t, dl[0].PayloadB64, 2048, "a payload that is not JSON is kept in base64")
	assert.Contains(t, dl[0].Reason, "refused by the server")
}
