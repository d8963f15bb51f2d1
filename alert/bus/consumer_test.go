package bus

import (
	"context"
	"fmt"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"stillwater/alert"
)

// consumerServer is an embedded server with a daemon publishing through
// a Publisher that keeps durable consumers for pager (a responder) and
// oper (an operator).
type consumerServer struct {
	emb *Embedded
	pub *Publisher
	js  jetstream.JetStream // the daemon's
}

func newConsumerServer(t *testing.T) *consumerServer {
	t.Helper()
	emb, err := StartEmbedded(EmbeddedConfig{Listen: "127.0.0.1:-1", StoreDir: t.TempDir(), Prefix: "sw", Users: []User{
		{"daemon", "d-pass", RoleDaemon}, {"pager", "p-pass", RoleResponder}, {"oper", "o-pass", RoleOperator}}})
	require.NoError(t, err)
	t.Cleanup(emb.Shutdown)
	dn := connect(t, emb.URL(), nats.UserInfo("daemon", "d-pass"))
	p, err := NewPublisherWith(context.Background(), dn, PublisherConfig{Prefix: "sw", Outbox: OutboxConfig{Dir: t.TempDir()},
		Consumers: []string{"pager", "oper"}})
	require.NoError(t, err)
	t.Cleanup(func() { p.Close() })
	runPublisher(t, p)
	js, err := jetstream.New(dn)
	require.NoError(t, err)
	return &consumerServer{emb: emb, pub: p, js: js}
}

// publish sends a start target for camera north with sequence seq and
// returns its body.
func (cs *consumerServer) publish(t *testing.T, seq int) []byte {
	t.Helper()
	b := targetJSON(t, "north", seq, "start")
	require.NoError(t, cs.pub.Publish(context.Background(), "north", alert.KindTarget, fmt.Sprintf("durable-%d", seq), b))
	return b
}

// TestResponderCatchesUpFromItsDurable: a responder reads and
// acknowledges a target, goes away, three messages are stored meanwhile,
// and once back it receives exactly those, in order, from the durable
// consumer named after it; nothing it acknowledged comes again.
func TestResponderCatchesUpFromItsDurable(t *testing.T) {
	cs := newConsumerServer(t)
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	first := cs.publish(t, 1)

	read := func(n int) [][]byte {
		t.Helper()
		nc, err := nats.Connect(cs.emb.URL(), nats.UserInfo("pager", "p-pass"))
		require.NoError(t, err)
		defer nc.Close() // the responder goes away
		js, err := jetstream.New(nc)
		require.NoError(t, err)
		cons, err := js.Consumer(ctx, DefaultStreamName, "pager")
		require.NoError(t, err, "the responder binds its durable")
		batch, err := cons.Fetch(n, jetstream.FetchMaxWait(10*time.Second))
		require.NoError(t, err)
		var got [][]byte
		for m := range batch.Messages() {
			require.NoError(t, m.DoubleAck(ctx), "the responder acknowledges")
			got = append(got, m.Data())
		}
		require.NoError(t, batch.Error())
		more, err := cons.FetchNoWait(10)
		require.NoError(t, err)
		for m := range more.Messages() {
			t.Errorf("unexpected further message %s", m.Data())
		}
		return got
	}
	require.Equal(t, [][]byte{first}, read(1))

	var missed [][]byte
	for seq := 2; seq <= 4; seq++ {
		missed = append(missed, cs.publish(t, seq))
	}
	// The server counts a stored message into a consumer's pending a
	// moment after acknowledging it to the publisher.
	var pending uint64
	assert.Eventually(t, func() bool {
		info, err := cs.js.Consumer(ctx, DefaultStreamName, "pager")
		if err != nil {
			return false
		}
		pending = info.CachedInfo().NumPending
		return pending == 3
	}, 5*time.Second, 20*time.Millisecond, "kept for the absent responder: %d pending, want 3", pending)

	assert.Equal(t, missed, read(3), "back, it catches up on what was stored while away")

	// The operator's durable was never read: it holds all four.
	info, err := cs.js.Consumer(ctx, DefaultStreamName, "oper")
	require.NoError(t, err)
	assert.Equal(t, uint64(4), info.CachedInfo().NumPending)
}

// TestResponderJetStreamScope: a responder may look up, pull from and
// acknowledge its own durable and make no other JetStream request: not
// delete or purge the stream, not look at or read another user's
// consumer, not make, change or delete a consumer, not fetch stored
// messages directly. Each refusal is the server's permissions violation.
func TestResponderJetStreamScope(t *testing.T) {
	cs := newConsumerServer(t)
	cs.publish(t, 1)
	violations := make(chan error, 16)
	nc := connect(t, cs.emb.URL(), nats.UserInfo("pager", "p-pass"),
		nats.ErrorHandler(func(_ *nats.Conn, _ *nats.Subscription, err error) { violations <- err }))
	refused := []struct {
		name, subject, body string
	}{
		{"delete the stream", "$JS.API.STREAM.DELETE.STILLWATER", ``},
		{"purge the stream", "$JS.API.STREAM.PURGE.STILLWATER", ``},
		{"stream info", "$JS.API.STREAM.INFO.STILLWATER", ``},
		{"list consumers", "$JS.API.CONSUMER.NAMES.STILLWATER", ``},
		{"another's consumer info", "$JS.API.CONSUMER.INFO.STILLWATER.oper", ``},
		{"pull from another's consumer", "$JS.API.CONSUMER.MSG.NEXT.STILLWATER.oper", `{"batch":1}`},
		{"change its own consumer", "$JS.API.CONSUMER.CREATE.STILLWATER.pager",
			`{"stream_name":"STILLWATER","config":{"durable_name":"pager","deliver_subject":"sw.north.heartbeat","ack_policy":"explicit"}}`},
		{"make a consumer", "$JS.API.CONSUMER.DURABLE.CREATE.STILLWATER.pager2",
			`{"stream_name":"STILLWATER","config":{"durable_name":"pager2","ack_policy":"explicit"}}`},
		{"delete its own consumer", "$JS.API.CONSUMER.DELETE.STILLWATER.pager", ``},
		{"read a stored message", "$JS.API.STREAM.MSG.GET.STILLWATER", `{"seq":1}`},
		{"direct get", "$JS.API.DIRECT.GET.STILLWATER", `{"seq":1}`},
		{"acknowledge for another", "$JS.ACK.STILLWATER.oper.1.1.1.0.0", `+ACK`},
	}
	for _, r := range refused {
		require.NoError(t, nc.PublishRequest(r.subject, nats.NewInbox(), []byte(r.body)), r.name)
		select {
		case err := <-violations:
			assert.ErrorContains(t, err, fmt.Sprintf("Permissions Violation for Publish to %q", r.subject), r.name)
		case <-time.After(5 * time.Second):
			t.Fatalf("%s: the server let the responder publish on %s", r.name, r.subject)
		}
	}

	// What it may do still works, and nothing above took effect.
	ctx, cancel := context.WithTimeout(context.Background(), 20*time.Second)
	defer cancel()
	js, err := jetstream.New(nc)
	require.NoError(t, err)
	cons, err := js.Consumer(ctx, DefaultStreamName, "pager")
	require.NoError(t, err)
	assert.Empty(t, cons.CachedInfo().Config.DeliverSubject, "still a pull consumer")
	batch, err := cons.Fetch(1, jetstream.FetchMaxWait(10*time.Second))
	require.NoError(t, err)
	n := 0
	for m := range batch.Messages() {
		require.NoError(t, m.DoubleAck(ctx))
		n++
	}
	assert.Equal(t, 1, n)
	s, err := cs.js.Stream(ctx, DefaultStreamName)
	require.NoError(t, err, "the stream is still there")
	assert.Equal(t, uint64(1), s.CachedInfo().State.Msgs)
	names := s.ConsumerNames(ctx)
	var got []string
	for name := range names.Name() {
		got = append(got, name)
	}
	require.NoError(t, names.Err())
	assert.ElementsMatch(t, []string{"pager", "oper"}, got, "no consumer made or deleted")
	oper, err := cs.js.Consumer(ctx, DefaultStreamName, "oper")
	require.NoError(t, err)
	assert.Equal(t, uint64(1), oper.CachedInfo().NumPending, "the operator's message was not acknowledged by the responder")
}

// The durable consumers come back with the stream when it has to be made
// again, and keep what is stored from then on.
func TestDurablesMadeAgainWithTheStream(t *testing.T) {
	cs := newConsumerServer(t)
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	require.NoError(t, cs.js.DeleteStream(ctx, DefaultStreamName))
	seq := 10
	require.Eventually(t, func() bool {
		if _, err := cs.js.Consumer(ctx, DefaultStreamName, "pager"); err == nil {
			return true
		}
		seq++
		cs.publish(t, seq) // a publish finds the stream gone and has it made again
		return false
	}, 20*time.Second, 100*time.Millisecond)
	pending := func() uint64 {
		c, err := cs.js.Consumer(ctx, DefaultStreamName, "pager")
		if err != nil {
			return 0
		}
		return c.CachedInfo().NumPending
	}
	before := pending()
	cs.publish(t, 100)
	// Counted into the consumer's pending a moment after it is stored.
	assert.Eventually(t, func() bool { return pending() == before+1 }, 5*time.Second, 20*time.Millisecond,
		"the message published after the stream came back is kept for the responder (pending %d before)", before)
}
