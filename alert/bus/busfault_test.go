package bus

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"log/slog"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"stillwater/alert"
	"stillwater/vision/refdata"
)

// Fault injection on the bus side: a stream that cannot be created, an
// outbox head the server never acknowledges, an outbox file with a record
// no message could have produced.

// ackLog records when each message id was acknowledged.
type ackLog struct {
	mu  sync.Mutex
	at  map[string]time.Time
	bad []PublishResult
}

func newAckLog() *ackLog { return &ackLog{at: map[string]time.Time{}} }

func (a *ackLog) result(r PublishResult) {
	a.mu.Lock()
	defer a.mu.Unlock()
	if r.Err != nil {
		a.bad = append(a.bad, r)
		return
	}
	a.at[r.ID] = time.Now()
}

func (a *ackLog) acked(id string) (time.Time, bool) {
	a.mu.Lock()
	defer a.mu.Unlock()
	t, ok := a.at[id]
	return t, ok
}

// lockedBuffer is a log destination safe for the publisher's goroutines.
type lockedBuffer struct {
	mu sync.Mutex
	b  bytes.Buffer
}

func (l *lockedBuffer) Write(p []byte) (int, error) {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.b.Write(p)
}

func (l *lockedBuffer) String() string {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.b.String()
}

func bufLog(w *lockedBuffer) *slog.Logger { return slog.New(slog.NewTextHandler(w, nil)) }

// deadBus returns a connection to a port where nothing listens: the
// daemon's view of a server that is down.
func deadBus(t testing.TB) *nats.Conn {
	t.Helper()
	return connect(t, "nats://127.0.0.1:"+strconv.Itoa(freePort(t)))
}

func runPublisher(t testing.TB, p *Publisher) {
	t.Helper()
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan struct{})
	go func() { defer close(done); p.Run(ctx) }()
	t.Cleanup(func() { cancel(); <-done })
}

// queueWhileDown leaves n targets of camera north in the outbox of dir,
// queued under prefix by a publisher whose server is down.
func queueWhileDown(t *testing.T, dir, prefix string, n int) []string {
	t.Helper()
	p, err := NewPublisherWith(context.Background(), deadBus(t), PublisherConfig{Prefix: prefix, Outbox: OutboxConfig{Dir: dir}})
	require.NoError(t, err)
	var ids []string
	for i := 0; i < n; i++ {
		id := fmt.Sprintf("%s-left-%d", prefix, i)
		require.NoError(t, p.Publish(context.Background(), "north", alert.KindTarget, id, targetJSON(t, "north", i, "start")))
		ids = append(ids, id)
	}
	require.Equal(t, n, p.Stats().Depth)
	require.NoError(t, p.Close())
	return ids
}

// TestPoisonedHeadDoesNotBlock leaves three targets in the outbox under
// the prefix "old", restarts with the prefix "sw": the server never
// acknowledges the old subjects, because no stream captures them, or
// because the daemon's bus user may not publish them (it then drops them
// without a word and the acknowledgement times out). A new target must
// still be delivered at once, and the old ones end in the dead-letter file
// after DeadLetterTries tries.
func TestPoisonedHeadDoesNotBlock(t *testing.T) {
	// Each try of an old message waits for its acknowledgement that never
	// comes; a shorter wait than the 2 s default keeps the test quick and
	// leaves a fresh target a loaded machine's worth of time.
	const pokeAck = 500 * time.Millisecond
	cases := []struct {
		name   string
		users  bool
		reason string
	}{
		{"no stream holds the old subjects", false, "not acknowledged"},
		{"the daemon may not publish the old subjects", true, "not acknowledged"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			dir := t.TempDir()
			old := queueWhileDown(t, dir, "old", 3)

			ec := EmbeddedConfig{Listen: "127.0.0.1:-1", StoreDir: t.TempDir(), Name: "poison"}
			var auth []nats.Option
			if c.users {
				ec.Prefix, ec.Users = "sw", []User{{"daemon", "d-pass", RoleDaemon}}
				auth = append(auth, nats.UserInfo("daemon", "d-pass"), nats.ErrorHandler(func(*nats.Conn, *nats.Subscription, error) {}))
			}
			emb, err := StartEmbedded(ec)
			require.NoError(t, err)
			defer emb.Shutdown()
			url := emb.URL()
			if c.users {
				url = strings.Replace(url, "nats://", "nats://daemon:d-pass@", 1)
			}
			acks := newAckLog()
			p, err := NewPublisherWith(context.Background(), connect(t, emb.URL(), auth...), PublisherConfig{Prefix: "sw", Outbox: OutboxConfig{Dir: dir}, OnResult: acks.result, AckTimeout: pokeAck})
			require.NoError(t, err)
			defer p.Close()
			require.Equal(t, 3, p.Stats().Depth)
			runPublisher(t, p)

			start := time.Now()
			require.NoError(t, p.Publish(context.Background(), "north", alert.KindTarget, "fresh", targetJSON(t, "north", 9, "start")))
			require.Eventually(t, func() bool { _, ok := acks.acked("fresh"); return ok }, 30*time.Second, 5*time.Millisecond,
				"a new target waits behind messages the server never acknowledges: %+v", p.Stats())
			at, _ := acks.acked("fresh")
			wait := at.Sub(start)
			waitDrained(t, p, 60*time.Second)
			drained := time.Since(start)

			dl := readDeadLetters(t, filepath.Join(dir, DeadLetterFile))
			require.Len(t, dl, 3)
			for i, d := range dl {
				assert.Equal(t, old[i], d.ID, "dead letters keep the queue's order")
				assert.Equal(t, "old.north.target", d.Subject)
				assert.Equal(t, alert.KindTarget, d.Kind)
				assert.Equal(t, DeadLetterTries, d.Tries)
				assert.Contains(t, d.Reason, c.reason)
				var tg alert.Target
				require.NoError(t, json.Unmarshal(d.Payload, &tg), "the original payload is kept as JSON")
				assert.Equal(t, "north", tg.Camera)
			}
			st := p.Stats()
			assert.Equal(t, uint64(3), st.DeadLettered)
			assert.Zero(t, st.Depth)
			assert.Equal(t, map[string]int{"fresh": 1}, streamIDs(t, url, "STILLWATER"))
			refdata.Report(t, "poisoned outbox head, 3 targets under an old subject prefix (%s): a new target acknowledged %.1f ms after Publish; the 3 dead-lettered after %d tries each, outbox empty %.2f s after Publish",
				c.name, float64(wait.Microseconds())/1000, DeadLetterTries, drained.Seconds())
		})
	}
}

// TestRefusedOutboxMessageIsDeadLettered queues a 2 KiB fault while the
// server is down; the server that comes back takes at most 1 KiB per
// message. The refusal is final: the message goes to the dead-letter file
// at its first try, and the next one is delivered.
func TestRefusedOutboxMessageIsDeadLettered(t *testing.T) {
	dir := t.TempDir()
	p0, err := NewPublisherWith(context.Background(), deadBus(t), PublisherConfig{Prefix: "sw", Outbox: OutboxConfig{Dir: dir}})
	require.NoError(t, err)
	big := []byte(`{"v":1,"kind":"fault","camera":"north","message":"` + strings.Repeat("x", 2048) + `"}`)
	require.NoError(t, p0.Publish(context.Background(), "north", alert.KindFault, "big", big))
	require.NoError(t, p0.Publish(context.Background(), "north", alert.KindTarget, "small", targetJSON(t, "north", 1, "start")))
	require.NoError(t, p0.Close())

	opts := singleNode(t, t.TempDir())
	opts.MaxPayload = 1024
	srv := mustStart(t, opts)
	defer stop(srv)
	p, err := NewPublisherWith(context.Background(), connect(t, srv.ClientURL()), PublisherConfig{Prefix: "sw", Outbox: OutboxConfig{Dir: dir}})
	require.NoError(t, err)
	defer p.Close()
	runPublisher(t, p)
	waitDrained(t, p, 10*time.Second)
	dl := readDeadLetters(t, filepath.Join(dir, DeadLetterFile))
	require.Len(t, dl, 1)
	assert.Equal(t, "big", dl[0].ID)
	assert.Equal(t, 1, dl[0].Tries)
	assert.Contains(t, dl[0].Reason, "refused by the server")
	assert.JSONEq(t, string(big), string(dl[0].Payload))
	assert.Equal(t, map[string]int{"small": 1}, streamIDs(t, srv.ClientURL(), "STILLWATER"))
}

// TestDeletedStreamIsMadeAgain deletes the stream under a running
// publisher: the messages that then get no answer are the stream's
// failure, not theirs. The stream is made again and every message
// delivered; none goes to the dead-letter file.
func TestDeletedStreamIsMadeAgain(t *testing.T) {
	srv := mustStart(t, singleNode(t, t.TempDir()))
	defer stop(srv)
	nc := connect(t, srv.ClientURL())
	p, err := NewPublisherWith(context.Background(), nc, PublisherConfig{Prefix: "sw", Outbox: OutboxConfig{Dir: t.TempDir()}})
	require.NoError(t, err)
	defer p.Close()
	runPublisher(t, p)
	require.NoError(t, p.Publish(context.Background(), "north", alert.KindTarget, "before", targetJSON(t, "north", 0, "start")))
	js, err := jetstream.New(nc)
	require.NoError(t, err)
	require.NoError(t, js.DeleteStream(context.Background(), "STILLWATER"))
	var sent []string
	for i := 1; i <= 20; i++ {
		id := fmt.Sprintf("after-%d", i)
		require.NoError(t, p.Publish(context.Background(), "north", alert.KindTarget, id, targetJSON(t, "north", i, "start")))
		sent = append(sent, id)
	}
	waitDrained(t, p, 30*time.Second)
	assert.Zero(t, p.Stats().DeadLettered)
	exactlyOnce(t, streamIDs(t, srv.ClientURL(), "STILLWATER"), sent)
}

func readDeadLetters(t *testing.T, path string) []DeadLetter {
	t.Helper()
	b, err := os.ReadFile(path)
	require.NoError(t, err)
	var out []DeadLetter
	for _, line := range bytes.Split(bytes.TrimSpace(b), []byte("\n")) {
		var d DeadLetter
		require.NoError(t, json.Unmarshal(line, &d), "dead-letter line %s", line)
		out = append(out, d)
	}
	return out
}

// writeOutboxLog writes lines as the outbox file of dir.
func writeOutboxLog(t *testing.T, dir string, lines ...string) {
	t.Helper()
	var b bytes.Buffer
	for _, l := range lines {
		b.WriteString(l)
		b.WriteByte('\n')
	}
	require.NoError(t, os.WriteFile(filepath.Join(dir, "outbox.log"), b.Bytes(), 0o640))
}

func recordLine(t *testing.T, r outboxRecord) string {
	t.Helper()
	b, err := json.Marshal(r)
	require.NoError(t, err)
	return string(b)
}

// TestEmptySubjectRecordIsSetAside puts a record with an empty subject at
// the head of the outbox, before a good one. The publisher must start, set
// the bad record aside in outbox.log.rejected, and deliver the good one.
func TestEmptySubjectRecordIsSetAside(t *testing.T) {
	dir := t.TempDir()
	at := time.Date(2026, 12, 2, 0, 0, 0, 0, time.UTC)
	writeOutboxLog(t, dir,
		recordLine(t, outboxRecord{N: 1, ID: "bad", Subject: "", Kind: alert.KindTarget, Queued: at, Data: targetJSON(t, "north", 1, "start")}),
		recordLine(t, outboxRecord{N: 2, ID: "good", Subject: "sw.north.target", Kind: alert.KindTarget, Queued: at, Data: targetJSON(t, "north", 2, "start")}))

	srv := mustStart(t, singleNode(t, t.TempDir()))
	defer stop(srv)
	var logs lockedBuffer
	p, err := NewPublisherWith(context.Background(), connect(t, srv.ClientURL()), PublisherConfig{Prefix: "sw", Outbox: OutboxConfig{Dir: dir}, Log: bufLog(&logs)})
	require.NoError(t, err)
	defer p.Close()
	runPublisher(t, p)
	waitDrained(t, p, 10*time.Second)
	assert.Equal(t, map[string]int{"good": 1}, streamIDs(t, srv.ClientURL(), "STILLWATER"))

	st := p.Stats()
	assert.Equal(t, 1, st.Rejected)
	rej, err := os.ReadFile(filepath.Join(dir, "outbox.log.rejected"))
	require.NoError(t, err)
	var r rejectedLine
	require.NoError(t, json.Unmarshal(bytes.TrimSpace(rej), &r))
	assert.Equal(t, 1, r.Line)
	assert.Contains(t, r.Reason, "subject")
	assert.Contains(t, r.Raw, `"id":"bad"`)
	assert.Contains(t, logs.String(), "outbox.log.rejected")
	assert.Contains(t, logs.String(), "line=1")
	assert.Contains(t, logs.String(), "level=ERROR")
}

// TestStreamOverlapIsAFault makes the stream impossible to create: its
// subjects already belong to another stream, made by an earlier run under
// another stream name, or by someone else on the same server. Messages
// must still get out (the other stream acknowledges them), the fault must
// name both streams and the subjects, and removing the other stream must
// clear it without a restart.
func TestStreamOverlapIsAFault(t *testing.T) {
	cases := []struct {
		name    string
		other   string
		prepare func(t *testing.T, js jetstream.JetStream, nc *nats.Conn)
		mine    string
		earlier string // the other stream when its subjects are exactly ours
	}{
		{"earlier run, other name", "STILLWATER", func(t *testing.T, _ jetstream.JetStream, nc *nats.Conn) {
			p, err := NewPublisher(context.Background(), nc, "sw", StreamConfig{})
			require.NoError(t, err)
			require.NoError(t, p.Close())
		}, "POOL", "STILLWATER"},
		{"someone else's stream", "ALERTS", func(t *testing.T, js jetstream.JetStream, _ *nats.Conn) {
			_, err := js.CreateStream(context.Background(), jetstream.StreamConfig{Name: "ALERTS", Subjects: []string{"sw.>"}})
			require.NoError(t, err)
		}, "STILLWATER", ""},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			srv := mustStart(t, singleNode(t, t.TempDir()))
			defer stop(srv)
			nc := connect(t, srv.ClientURL())
			js, err := jetstream.New(nc)
			require.NoError(t, err)
			c.prepare(t, js, nc)

			var logs lockedBuffer
			acks := newAckLog()
			p, err := NewPublisherWith(context.Background(), nc, PublisherConfig{Prefix: "sw", Stream: StreamConfig{Name: c.mine},
				Outbox: OutboxConfig{Dir: t.TempDir()}, OnResult: acks.result, Log: bufLog(&logs), StreamRetry: 200 * time.Millisecond})
			require.NoError(t, err)
			defer p.Close()
			runPublisher(t, p)

			var conflict *StreamConflictError
			require.ErrorAs(t, p.StreamFault(), &conflict)
			assert.Equal(t, c.mine, conflict.Stream)
			assert.Equal(t, []string{c.other}, conflict.Owners)
			assert.Equal(t, StreamSubjects("sw"), conflict.Subjects)
			assert.Equal(t, c.earlier, conflict.Earlier)
			assert.Contains(t, logs.String(), "level=ERROR")
			assert.Contains(t, logs.String(), c.mine)
			assert.Contains(t, logs.String(), c.other)

			// The alarm still gets out through the stream that holds the subjects.
			start := time.Now()
			require.NoError(t, p.Publish(context.Background(), "north", alert.KindTarget, "during", targetJSON(t, "north", 1, "start")))
			require.Eventually(t, func() bool { _, ok := acks.acked("during"); return ok }, 10*time.Second, 10*time.Millisecond,
				"a target published while the stream cannot be created was never acknowledged: %+v", p.Stats())
			at, _ := acks.acked("during")
			assert.Equal(t, 1, streamIDs(t, srv.ClientURL(), c.other)["during"])

			// Fixed on the server side: the fault clears without a restart.
			require.NoError(t, js.DeleteStream(context.Background(), c.other))
			fixed := time.Now()
			require.Eventually(t, func() bool { return p.StreamFault() == nil }, 10*time.Second, 10*time.Millisecond)
			recovered := time.Since(fixed)
			require.NoError(t, p.Publish(context.Background(), "north", alert.KindTarget, "after", targetJSON(t, "north", 2, "start")))
			waitDrained(t, p, 10*time.Second)
			assert.Equal(t, 1, streamIDs(t, srv.ClientURL(), c.mine)["after"])
			refdata.Report(t, "stream overlap (%s): target acknowledged by %s %.1f ms after Publish; fault cleared %.2f s after the other stream was removed (retry every 0.2 s)",
				c.name, c.other, float64(at.Sub(start).Microseconds())/1000, recovered.Seconds())
		})
	}
}
