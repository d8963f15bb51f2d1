package alert

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"sync"
	"sync/atomic"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"
)

// StreamConfig describes the JetStream stream that keeps alarm messages:
// targets, cleared, faults and armed changes of every camera.
type StreamConfig struct {
	Name     string        // default STILLWATER
	MaxAge   time.Duration // default 30 days
	MaxBytes int64         // default 256 MiB
	// Duplicates is how long the server remembers message ids to drop
	// resent copies; default 1 h. A message whose first send timed out
	// and that is resent after a longer outage may be stored twice.
	Duplicates time.Duration
	// Replicas is the number of copies in a cluster; default 1.
	Replicas int
}

func (sc StreamConfig) withDefaults() StreamConfig {
	if sc.Name == "" {
		sc.Name = "STILLWATER"
	}
	if sc.MaxAge == 0 {
		sc.MaxAge = 30 * 24 * time.Hour
	}
	if sc.MaxBytes == 0 {
		sc.MaxBytes = 256 << 20
	}
	if sc.Duplicates == 0 {
		sc.Duplicates = time.Hour
	}
	if sc.Replicas == 0 {
		sc.Replicas = 1
	}
	return sc
}

// StreamSubjects returns the subjects the stream captures under prefix.
func StreamSubjects(prefix string) []string {
	var out []string
	for _, k := range []string{KindTarget, KindCleared, KindFault, KindArmed} {
		out = append(out, prefix+".*."+k)
	}
	return out
}

// PublishResult reports the fate of one Publish, to the OnResult callback.
type PublishResult struct {
	Camera, Kind, ID string
	// Latency is from the Publish call to the server's acknowledgement,
	// time spent in the outbox included.
	Latency time.Duration
	// Outboxed is true when the message went through the outbox.
	Outboxed bool
	// Err is set when the message was not delivered and will not be
	// (a dropped heartbeat, a refused or dropped message, a permanent error).
	Err error
}

// Stats is a snapshot of the publisher's counters.
type Stats struct {
	Depth       int       // messages in the outbox
	Bytes       int64     // payload bytes in the outbox
	Oldest      time.Time // queue time of the oldest outbox message; zero when empty
	Queued      uint64    // messages that went to the outbox, ever
	Dropped     uint64    // low-priority messages dropped from a full outbox
	Refused     uint64    // messages refused by a full outbox (Publish returned ErrOutboxFull)
	Failed      uint64    // outbox messages removed after a permanent server error
	Acked       uint64    // stream messages acknowledged
	BeatsLost   uint64    // plain messages (heartbeats) not sent while disconnected
	CorruptRead int       // unreadable outbox lines skipped when it was opened
}

// Lost is every message that will never be delivered: the sum for
// stillwater_outbox_dropped_total.
func (s Stats) Lost() uint64 { return s.Dropped + s.Refused + s.Failed }

// PublisherConfig sets up a Publisher.
type PublisherConfig struct {
	Prefix string
	Stream StreamConfig
	Outbox OutboxConfig
	// AckTimeout bounds the wait for one acknowledgement; default 2 s.
	// Publish falls back to the outbox after it, so it is the longest a
	// camera loop waits for a hanging server.
	AckTimeout time.Duration
	// OnResult, if set, is called once per durable message when it is
	// acknowledged, and for every message lost. It runs on the caller's
	// or the drain goroutine; keep it short.
	OnResult func(PublishResult)
	// OnBacklog, if set, is called when the outbox stops being empty
	// (true) and when it drains (false): raise or clear bus_backlog. It
	// may call Publish.
	OnBacklog func(active bool, s Stats)
	Log       *slog.Logger
}

// Publisher sends messages to subjects under a prefix. Targets, cleared,
// faults and armed changes go to the JetStream stream with a
// de-duplication id and wait for the acknowledgement; when that fails they
// go to the outbox, which Run drains in order. Heartbeats are plain
// publishes, dropped while disconnected. Safe for concurrent use; Close
// releases the outbox.
type Publisher struct {
	nc  *nats.Conn
	js  jetstream.JetStream
	cfg PublisherConfig
	ob  *outbox
	log *slog.Logger

	wake    chan struct{}
	drainMu sync.Mutex // one drain at a time keeps the order

	streamMu sync.Mutex
	streamOK bool

	backlogMu sync.Mutex
	backlog   bool

	acked, failed, beatsLost atomic.Uint64
}

// NewPublisher makes sure the stream exists and returns a publisher on nc
// with an in-memory outbox. See NewPublisherWith for a durable one.
func NewPublisher(ctx context.Context, nc *nats.Conn, prefix string, sc StreamConfig) (*Publisher, error) {
	return NewPublisherWith(ctx, nc, PublisherConfig{Prefix: prefix, Stream: sc})
}

// NewPublisherWith opens the outbox and tries to create or update the
// stream. With an outbox directory, a server that is down is not an error:
// the stream is made once it is reachable and messages wait in the
// outbox. Call Run to drain the outbox and Close at the end.
func NewPublisherWith(ctx context.Context, nc *nats.Conn, cfg PublisherConfig) (*Publisher, error) {
	if err := ValidToken(cfg.Prefix); err != nil {
		return nil, fmt.Errorf("publisher: prefix: %v", err)
	}
	cfg.Stream = cfg.Stream.withDefaults()
	if cfg.AckTimeout <= 0 {
		cfg.AckTimeout = 2 * time.Second
	}
	log := cfg.Log
	if log == nil {
		log = slog.New(slog.NewTextHandler(io.Discard, nil))
	}
	js, err := jetstream.New(nc)
	if err != nil {
		return nil, fmt.Errorf("publisher: %w", err)
	}
	ob, err := openOutbox(cfg.Outbox)
	if err != nil {
		return nil, fmt.Errorf("publisher: %w", err)
	}
	p := &Publisher{nc: nc, js: js, cfg: cfg, ob: ob, log: log, wake: make(chan struct{}, 1)}
	if n := ob.stats().corrupt; n > 0 {
		log.Error("outbox had unreadable lines; those messages are lost", "lines", n, "dir", cfg.Outbox.Dir)
	}
	if err := p.ensureStream(ctx); err != nil {
		if cfg.Outbox.Dir == "" {
			ob.close()
			return nil, err
		}
		log.Warn("stream not created yet; messages wait in the outbox", "err", err)
	}
	if ob.stats().depth > 0 {
		p.setBacklog(true)
		p.signal()
	}
	return p, nil
}

func (p *Publisher) ensureStream(ctx context.Context) error {
	p.streamMu.Lock()
	defer p.streamMu.Unlock()
	if p.streamOK {
		return nil
	}
	if p.nc.Status() != nats.CONNECTED {
		return fmt.Errorf("publisher: create stream %s: %w", p.cfg.Stream.Name, ErrBusDown)
	}
	sc := p.cfg.Stream
	cctx, cancel := context.WithTimeout(ctx, 5*time.Second)
	defer cancel()
	_, err := p.js.CreateOrUpdateStream(cctx, jetstream.StreamConfig{
		Name:       sc.Name,
		Subjects:   StreamSubjects(p.cfg.Prefix),
		Storage:    jetstream.FileStorage,
		MaxAge:     sc.MaxAge,
		MaxBytes:   sc.MaxBytes,
		Duplicates: sc.Duplicates,
		Replicas:   sc.Replicas,
	})
	if err != nil {
		return fmt.Errorf("publisher: create stream %s: %w", sc.Name, err)
	}
	p.streamOK = true
	return nil
}

func (p *Publisher) streamReady() bool {
	p.streamMu.Lock()
	defer p.streamMu.Unlock()
	return p.streamOK
}

func (p *Publisher) streamLost() {
	p.streamMu.Lock()
	p.streamOK = false
	p.streamMu.Unlock()
}

// durable reports whether kind goes to the stream.
func durable(kind string) bool {
	switch kind {
	case KindTarget, KindCleared, KindFault, KindArmed:
		return true
	}
	return false
}

// lowPriority marks target updates: a later update supersedes them.
func lowPriority(kind string, data []byte) bool {
	if kind != KindTarget {
		return false
	}
	var m struct {
		Event string `json:"event"`
	}
	return json.Unmarshal(data, &m) == nil && m.Event == "update"
}

// Publish sends data for camera and kind; id de-duplicates retries and
// must be stable for the same message. Durable kinds return nil once the
// message is acknowledged or safely queued in the outbox; the error is
// ErrOutboxFull (wrapped) when it was refused. Heartbeats return ErrBusDown
// while disconnected. Publish waits at most AckTimeout.
func (p *Publisher) Publish(ctx context.Context, camera, kind, id string, data []byte) error {
	subj := Subject(p.cfg.Prefix, camera, kind)
	if !durable(kind) {
		if p.nc.Status() != nats.CONNECTED {
			p.beatsLost.Add(1)
			p.report(PublishResult{Camera: camera, Kind: kind, Err: ErrBusDown})
			return fmt.Errorf("publish %s: %w", subj, ErrBusDown)
		}
		if err := p.nc.Publish(subj, data); err != nil {
			return fmt.Errorf("publish %s: %w", subj, err)
		}
		return nil
	}
	start := time.Now() // latency is measured, not simulated: no injected clock
	if p.ob.stats().depth == 0 && p.nc.Status() == nats.CONNECTED && p.streamReady() {
		err := p.send(ctx, subj, id, data)
		if err == nil {
			p.acked.Add(1)
			p.report(PublishResult{Camera: camera, Kind: kind, ID: id, Latency: time.Since(start)})
			return nil
		}
		if permanent(err) {
			p.report(PublishResult{Camera: camera, Kind: kind, ID: id, Err: err})
			return fmt.Errorf("publish %s: %w", subj, err)
		}
		p.log.Debug("publish not acknowledged; queueing in the outbox", "subject", subj, "err", err)
	}
	rec := outboxRecord{ID: id, Subject: subj, Kind: kind, Low: lowPriority(kind, data), Queued: start, Data: data}
	dropped, err := p.ob.push(rec)
	for range dropped {
		p.report(PublishResult{Kind: KindTarget, Outboxed: true, Err: errors.New("dropped from a full outbox")})
	}
	if err != nil {
		p.report(PublishResult{Camera: camera, Kind: kind, ID: id, Outboxed: true, Err: err})
		return fmt.Errorf("publish %s: %w", subj, err)
	}
	p.setBacklog(true)
	p.signal()
	return nil
}

func (p *Publisher) send(ctx context.Context, subj, id string, data []byte) error {
	actx, cancel := context.WithTimeout(ctx, p.cfg.AckTimeout)
	defer cancel()
	_, err := p.js.Publish(actx, subj, data, jetstream.WithMsgID(id))
	if errors.Is(err, jetstream.ErrNoStreamResponse) || errors.Is(err, nats.ErrNoResponders) {
		p.streamLost()
	}
	return err
}

// permanent reports errors that no resend can fix: a payload over the
// server's limit, a bad subject, or a server refusal in the 4xx range other
// than "not found" (the stream is recreated) and timeouts. 5xx answers such
// as "temporarily unavailable" during a leader election are retried.
func permanent(err error) bool {
	if errors.Is(err, nats.ErrMaxPayload) || errors.Is(err, nats.ErrBadSubject) {
		return true
	}
	var api *jetstream.APIError
	return errors.As(err, &api) && api.Code >= 400 && api.Code < 500 && api.Code != 404 && api.Code != 408
}

func (p *Publisher) report(r PublishResult) {
	if p.cfg.OnResult != nil {
		p.cfg.OnResult(r)
	}
}

func (p *Publisher) signal() {
	select {
	case p.wake <- struct{}{}:
	default:
	}
}

func (p *Publisher) setBacklog(active bool) {
	p.backlogMu.Lock()
	changed := p.backlog != active
	p.backlog = active
	p.backlogMu.Unlock()
	if changed && p.cfg.OnBacklog != nil {
		p.cfg.OnBacklog(active, p.Stats())
	}
}

// Run drains the outbox whenever it holds messages and the connection is
// up, in order, removing each message only after its acknowledgement. It
// returns nil when ctx ends; queued messages stay on disk.
func (p *Publisher) Run(ctx context.Context) error {
	t := time.NewTicker(250 * time.Millisecond)
	defer t.Stop()
	for {
		select {
		case <-ctx.Done():
			return nil
		case <-p.wake:
		case <-t.C:
		}
		if err := p.drain(ctx); err != nil && ctx.Err() == nil {
			p.log.Debug("outbox waits", "err", err, "depth", p.ob.stats().depth)
		}
	}
}

// drain sends outbox messages until it is empty or a send fails.
func (p *Publisher) drain(ctx context.Context) error {
	p.drainMu.Lock()
	defer p.drainMu.Unlock()
	for {
		rec, ok := p.ob.head()
		if !ok {
			p.setBacklog(false)
			return nil
		}
		if err := ctx.Err(); err != nil {
			return err
		}
		if p.nc.Status() != nats.CONNECTED {
			return ErrBusDown
		}
		if err := p.ensureStream(ctx); err != nil {
			return err
		}
		err := p.send(ctx, rec.Subject, rec.ID, rec.Data)
		switch {
		case err == nil:
			p.acked.Add(1)
			p.report(PublishResult{Kind: rec.Kind, Camera: cameraOf(rec.Subject, p.cfg.Prefix), ID: rec.ID, Latency: time.Since(rec.Queued), Outboxed: true})
		case permanent(err):
			p.failed.Add(1)
			p.log.Error("outbox message refused by the server; removed", "subject", rec.Subject, "id", rec.ID, "err", err)
			p.report(PublishResult{Kind: rec.Kind, Camera: cameraOf(rec.Subject, p.cfg.Prefix), ID: rec.ID, Outboxed: true, Err: err})
		default:
			return err
		}
		if err := p.ob.remove(rec.N); err != nil {
			return err
		}
	}
}

func cameraOf(subject, prefix string) string {
	s := subject[len(prefix)+1:]
	for i := 0; i < len(s); i++ {
		if s[i] == '.' {
			return s[:i]
		}
	}
	return s
}

// PublishArmed encodes and publishes an armed change to
// PREFIX.CAMERA.armed with ArmedID as its de-duplication id.
func (p *Publisher) PublishArmed(ctx context.Context, c ArmedChange) error {
	b, err := Encode(c)
	if err != nil {
		return err
	}
	return p.Publish(ctx, c.Camera, KindArmed, ArmedID(c), b)
}

// PublishFault encodes and publishes a fault to PREFIX.CAMERA.fault; epoch
// is the sender's start time, part of the de-duplication id (FaultID).
func (p *Publisher) PublishFault(ctx context.Context, f Fault, epoch time.Time) error {
	b, err := Encode(f)
	if err != nil {
		return err
	}
	return p.Publish(ctx, f.Camera, KindFault, FaultID(f, epoch), b)
}

// Flush sends what the outbox holds (if the bus is up) and waits until the
// server has processed everything sent so far. Messages still queued when
// ctx ends stay in the outbox. Without a deadline on ctx, Flush gives up
// after 10 s.
func (p *Publisher) Flush(ctx context.Context) error {
	if _, ok := ctx.Deadline(); !ok {
		var cancel context.CancelFunc
		ctx, cancel = context.WithTimeout(ctx, 10*time.Second)
		defer cancel()
	}
	if err := p.drain(ctx); err != nil {
		return fmt.Errorf("flush outbox (%d left): %w", p.ob.stats().depth, err)
	}
	return p.nc.FlushWithContext(ctx)
}

// Stats returns the current counters.
func (p *Publisher) Stats() Stats {
	o := p.ob.stats()
	return Stats{Depth: o.depth, Bytes: o.bytes, Oldest: o.oldest, Queued: o.queued, Dropped: o.dropped, Refused: o.refused,
		Failed: p.failed.Load(), Acked: p.acked.Load(), BeatsLost: p.beatsLost.Load(), CorruptRead: o.corrupt}
}

// Close releases the outbox. It does not close the NATS connection.
func (p *Publisher) Close() error { return p.ob.close() }
