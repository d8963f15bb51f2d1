package bus

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"log/slog"
	"slices"
	"sort"
	"strings"
	"sync"
	"sync/atomic"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"

	"stillwater/alert"
)

// DefaultStreamName is the stream's name unless configured otherwise.
const DefaultStreamName = "STILLWATER"

// StreamConfig describes the JetStream stream that keeps alarm messages:
// targets, cleared, faults and armed changes of every camera.
type StreamConfig struct {
	Name     string        // default DefaultStreamName
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
		sc.Name = DefaultStreamName
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
	for _, k := range []string{alert.KindTarget, alert.KindCleared, alert.KindFault, alert.KindArmed} {
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
	// (a dropped heartbeat, a refused or dropped message, one moved to
	// the dead-letter file).
	Err error
}

// Stats is a snapshot of the publisher's counters.
type Stats struct {
	Depth        int       // messages in the outbox
	Bytes        int64     // payload bytes in the outbox
	Oldest       time.Time // queue time of the oldest outbox message; zero when empty
	Queued       uint64    // messages that went to the outbox, ever
	Dropped      uint64    // low-priority messages dropped from a full outbox
	Refused      uint64    // messages refused by a full outbox (Publish returned ErrOutboxFull)
	DeadLettered uint64    // messages the server refused or never acknowledged, moved to the dead-letter file
	Acked        uint64    // stream messages acknowledged
	BeatsLost    uint64    // plain messages (heartbeats) not sent while disconnected
	Rejected     int       // outbox lines set aside as invalid when it was opened
}

// Lost is every message that will never be delivered by the publisher:
// dropped, refused, or moved to the dead-letter file.
func (s Stats) Lost() uint64 { return s.Dropped + s.Refused + s.DeadLettered }

// Delivery bounds. A message the server refuses outright (a permanent
// error) is moved to the dead-letter file at once. One that is not
// acknowledged by its own fault (see messageAtFault), or whose subject is
// not one the stream holds, is tried apart from the others (runRetries),
// DeadLetterTries times with retryBase, 2×, 4×… (at most retryMax)
// between tries, and then moved there: it holds no later message back.
const (
	DeadLetterTries = 5
	retryBase       = 250 * time.Millisecond
	retryMax        = 4 * time.Second
	// passFailures ends a drain pass after this many failures in a row
	// that are not the message's fault (the stream or the server's).
	passFailures = 8
)

// retryDelay is the wait after the try-th failed try (1-based).
func retryDelay(try int) time.Duration {
	d := retryBase
	for i := 1; i < try && d < retryMax; i++ {
		d *= 2
	}
	return min(d, retryMax)
}

// PublisherConfig sets up a Publisher.
type PublisherConfig struct {
	Prefix string
	Stream StreamConfig
	Outbox OutboxConfig
	// AckTimeout bounds the wait for one acknowledgement; default 2 s.
	// Publish falls back to the outbox after it, so it is the longest a
	// camera loop waits for a hanging server.
	AckTimeout time.Duration
	// StreamRetry is how often a stream that could not be created is
	// tried again; default 1 s.
	StreamRetry time.Duration
	// Consumers names durable pull consumers the publisher keeps on the
	// stream for integrators, each named after the bus user that reads it
	// (the responder and operator roles may bind and read their own; see
	// ConsumerConfig). Each is made when the stream is, if missing, and
	// then holds every message stored since, until that user acknowledges
	// it, so that a responder that was away catches up.
	Consumers []string
	// OnResult, if set, is called once per durable message when it is
	// acknowledged, and for every message lost. It runs on the caller's
	// or the drain goroutine; keep it short.
	OnResult func(PublishResult)
	// OnBacklog, if set, is called when the outbox stops being empty
	// (true) and when it drains (false): raise or clear bus_backlog. It
	// may call Publish.
	OnBacklog func(active bool, s Stats)
	// OnStream, if set, is called when the stream cannot be created or
	// used (err, a *StreamConflictError when its subjects belong to
	// another stream) and when it is usable again (nil). Without it the
	// publisher logs these itself.
	OnStream func(err error)
	Log      *slog.Logger
}

// StreamConflictError means the stream cannot be created because its
// subjects already belong to other streams on the server.
type StreamConflictError struct {
	Stream   string   // the stream the publisher wants
	Subjects []string // its subjects
	Owners   []string // streams that hold some of them; empty if the server did not say
	// Earlier is the one of Owners whose subjects are exactly Subjects:
	// most likely made by an earlier run under another stream name.
	Earlier string
	Err     error // the server's answer
}

func (e *StreamConflictError) Error() string {
	owners := "another stream"
	if len(e.Owners) > 0 {
		owners = "stream " + strings.Join(e.Owners, ", ")
	}
	return fmt.Sprintf("stream %s cannot be created: its subjects %s already belong to %s",
		e.Stream, strings.Join(e.Subjects, ", "), owners)
}

func (e *StreamConflictError) Unwrap() error { return e.Err }

// Publisher sends messages to subjects under a prefix. Targets, cleared,
// faults and armed changes go to the JetStream stream with a
// de-duplication id and wait for the acknowledgement; when that fails they
// go to the outbox, which Run drains oldest first. Heartbeats are plain
// publishes, dropped while disconnected. Safe for concurrent use; Close
// releases the outbox.
type Publisher struct {
	nc  *nats.Conn
	js  jetstream.JetStream
	cfg PublisherConfig
	ob  *outbox
	log *slog.Logger

	wake    chan struct{}
	drainMu sync.Mutex // one drain at a time

	retryMu sync.Mutex
	retries map[uint64]*retryState // by outbox record number

	streamTry sync.Mutex // one creation attempt at a time
	streamMu  sync.Mutex // guards the three below
	streamOK  bool
	streamErr error     // why the stream cannot be used; nil when it can or the bus is down
	streamAt  time.Time // last creation attempt

	backlogMu sync.Mutex
	backlog   bool

	acked, beatsLost atomic.Uint64
}

// retryState is how often an outbox message was tried in vain, and when
// it may be tried next.
type retryState struct {
	tries int
	next  time.Time
}

// NewPublisher makes sure the stream exists and returns a publisher on nc
// with an in-memory outbox. See NewPublisherWith for a durable one.
func NewPublisher(ctx context.Context, nc *nats.Conn, prefix string, sc StreamConfig) (*Publisher, error) {
	return NewPublisherWith(ctx, nc, PublisherConfig{Prefix: prefix, Stream: sc})
}

// NewPublisherWith opens the outbox and tries to create or update the
// stream. With an outbox directory, neither a server that is down nor a
// stream that cannot be created is an error: Run keeps trying, the stream
// fault is reported (OnStream, StreamFault) and messages wait in the
// outbox unless another stream on the server acknowledges them. Call Run
// to drain the outbox and Close at the end.
func NewPublisherWith(ctx context.Context, nc *nats.Conn, cfg PublisherConfig) (*Publisher, error) {
	if err := alert.ValidToken(cfg.Prefix); err != nil {
		return nil, fmt.Errorf("publisher: prefix: %v", err)
	}
	cfg.Stream = cfg.Stream.withDefaults()
	for _, name := range cfg.Consumers {
		if err := ValidUserName(name); err != nil {
			return nil, fmt.Errorf("publisher: consumer name: %w", err)
		}
	}
	if cfg.AckTimeout <= 0 {
		cfg.AckTimeout = 2 * time.Second
	}
	if cfg.StreamRetry <= 0 {
		cfg.StreamRetry = time.Second
	}
	log := cfg.Log
	if log == nil {
		log = slog.New(slog.DiscardHandler)
	}
	js, err := jetstream.New(nc)
	if err != nil {
		return nil, fmt.Errorf("publisher: %w", err)
	}
	ob, err := openOutbox(cfg.Outbox)
	if err != nil {
		return nil, fmt.Errorf("publisher: %w", err)
	}
	p := &Publisher{nc: nc, js: js, cfg: cfg, ob: ob, log: log, wake: make(chan struct{}, 1), retries: map[uint64]*retryState{}}
	for _, r := range ob.rejected {
		lv := slog.LevelError
		if r.Torn {
			lv = slog.LevelWarn
		}
		log.Log(ctx, lv, "outbox line is not a valid message; set aside", "file", ob.rejectedPath(), "from", ob.path, "line", r.Line, "reason", r.Reason)
	}
	if err := p.ensureStream(ctx, true); err != nil {
		if cfg.Outbox.Dir == "" {
			ob.close()
			return nil, err
		}
		if errors.Is(err, ErrNotConnected) {
			log.Warn("bus not connected; messages wait in the outbox", "stream", cfg.Stream.Name)
		}
	}
	if ob.stats().depth > 0 {
		p.setBacklog(true)
		p.signal()
	}
	return p, nil
}

// ensureStream creates or updates the stream unless it is known to be
// there. While it is faulted, a new attempt is made at most every
// StreamRetry unless force is set. It returns ErrNotConnected (wrapped) while
// disconnected, and the fault otherwise.
func (p *Publisher) ensureStream(ctx context.Context, force bool) error {
	p.streamTry.Lock()
	defer p.streamTry.Unlock()
	p.streamMu.Lock()
	ok, fault, at := p.streamOK, p.streamErr, p.streamAt
	p.streamMu.Unlock()
	sc := p.cfg.Stream
	switch {
	case ok:
		return nil
	case p.nc.Status() != nats.CONNECTED:
		return fmt.Errorf("publisher: create stream %s: %w", sc.Name, ErrNotConnected)
	case fault != nil && !force && time.Since(at) < p.cfg.StreamRetry:
		return fault
	}
	cctx, cancel := context.WithTimeout(ctx, 5*time.Second)
	defer cancel()
	subjects := StreamSubjects(p.cfg.Prefix)
	_, err := p.js.CreateOrUpdateStream(cctx, jetstream.StreamConfig{
		Name:       sc.Name,
		Subjects:   subjects,
		Storage:    jetstream.FileStorage,
		MaxAge:     sc.MaxAge,
		MaxBytes:   sc.MaxBytes,
		Duplicates: sc.Duplicates,
		Replicas:   sc.Replicas,
	})
	if err == nil {
		p.ensureConsumers(cctx)
		p.setStream(true, nil)
		return nil
	}
	if ctx.Err() != nil || p.nc.Status() != nats.CONNECTED {
		p.streamMu.Lock()
		p.streamAt = time.Now()
		p.streamMu.Unlock()
		return fmt.Errorf("publisher: create stream %s: %w", sc.Name, err)
	}
	var api *jetstream.APIError
	if errors.As(err, &api) && api.ErrorCode == jetstream.ErrorCode(10065) { // JSStreamSubjectOverlapErr in nats-server's errors.json
		owners := p.owners(cctx, subjects)
		err = &StreamConflictError{Stream: sc.Name, Subjects: subjects, Owners: owners, Earlier: p.sameSubjects(cctx, owners, subjects), Err: err}
	} else {
		err = fmt.Errorf("stream %s cannot be created or updated: %w", sc.Name, err)
	}
	p.setStream(false, err)
	return err
}

// ConsumerConfig is the durable consumer kept for a bus user: pull (no
// deliver subject, so the server sends its messages only to whoever asks
// with the user's permissions), every stream subject, messages stored
// after it was made, explicit acknowledgement. A consumer of that name
// that exists already is left as it is.
func ConsumerConfig(user string) jetstream.ConsumerConfig {
	return jetstream.ConsumerConfig{
		Durable:       user,
		Description:   "stillwater messages kept for bus user " + user,
		DeliverPolicy: jetstream.DeliverNewPolicy,
		AckPolicy:     jetstream.AckExplicitPolicy,
	}
}

// ensureConsumers makes the configured durable consumers that are
// missing. A failure is logged: the stream still stores every message,
// and the next creation of the stream tries again.
func (p *Publisher) ensureConsumers(ctx context.Context) {
	for _, name := range p.cfg.Consumers {
		_, err := p.js.CreateConsumer(ctx, p.cfg.Stream.Name, ConsumerConfig(name))
		if err != nil && !errors.Is(err, jetstream.ErrConsumerExists) {
			p.log.Error("durable consumer for a bus user cannot be made; that user cannot catch up on what it missed",
				"stream", p.cfg.Stream.Name, "consumer", name, "err", err)
		}
	}
}

// owners lists the streams other than ours that hold any of subjects.
func (p *Publisher) owners(ctx context.Context, subjects []string) []string {
	var out []string
	seen := map[string]bool{p.cfg.Stream.Name: true}
	for _, subj := range subjects {
		l := p.js.StreamNames(ctx, jetstream.WithStreamListSubject(subj))
		for name := range l.Name() {
			if !seen[name] {
				seen[name] = true
				out = append(out, name)
			}
		}
	}
	sort.Strings(out)
	return out
}

// sameSubjects returns the first of streams whose subjects are exactly
// subjects, or "".
func (p *Publisher) sameSubjects(ctx context.Context, streams, subjects []string) string {
	want := slices.Sorted(slices.Values(subjects))
	for _, name := range streams {
		s, err := p.js.Stream(ctx, name)
		if err != nil {
			continue
		}
		if slices.Equal(slices.Sorted(slices.Values(s.CachedInfo().Config.Subjects)), want) {
			return name
		}
	}
	return ""
}

// setStream records the outcome of a creation attempt and reports a
// change of fault.
func (p *Publisher) setStream(ok bool, fault error) {
	p.streamMu.Lock()
	was := p.streamErr
	p.streamOK, p.streamErr, p.streamAt = ok, fault, time.Now()
	p.streamMu.Unlock()
	changed := (was == nil) != (fault == nil) || (was != nil && fault != nil && was.Error() != fault.Error())
	if !changed {
		return
	}
	if p.cfg.OnStream != nil {
		p.cfg.OnStream(fault)
		return
	}
	if fault != nil {
		p.log.Error("bus stream cannot be used; messages go out only if another stream takes them", "stream", p.cfg.Stream.Name, "err", fault)
	} else {
		p.log.Info("bus stream ready", "stream", p.cfg.Stream.Name)
	}
}

// StreamFault returns why the stream cannot be created or used, or nil.
// A bus that is down is not a stream fault.
func (p *Publisher) StreamFault() error {
	p.streamMu.Lock()
	defer p.streamMu.Unlock()
	return p.streamErr
}

func (p *Publisher) streamReady() bool {
	p.streamMu.Lock()
	defer p.streamMu.Unlock()
	return p.streamOK
}

// streamUsable reports whether a direct send is worth trying: the stream
// is there, or it is faulted and another stream may take the message.
func (p *Publisher) streamUsable() bool {
	p.streamMu.Lock()
	defer p.streamMu.Unlock()
	return p.streamOK || p.streamErr != nil
}

func (p *Publisher) streamLost() {
	p.streamMu.Lock()
	p.streamOK = false
	p.streamMu.Unlock()
}

// durable reports whether kind goes to the stream.
func durable(kind string) bool {
	switch kind {
	case alert.KindTarget, alert.KindCleared, alert.KindFault, alert.KindArmed:
		return true
	}
	return false
}

// lowPriority marks target updates: a later update supersedes them.
func lowPriority(kind string, data []byte) bool {
	if kind != alert.KindTarget {
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
// ErrOutboxFull (wrapped) when it was refused, and the server's when it
// refused the message outright (which then goes to the dead-letter file).
// Heartbeats return ErrNotConnected while disconnected. Publish waits at most
// AckTimeout.
func (p *Publisher) Publish(ctx context.Context, camera, kind, id string, data []byte) error {
	subj := alert.Subject(p.cfg.Prefix, camera, kind)
	if !durable(kind) {
		if p.nc.Status() != nats.CONNECTED {
			p.beatsLost.Add(1)
			p.report(PublishResult{Camera: camera, Kind: kind, Err: ErrNotConnected})
			return fmt.Errorf("publish %s: %w", subj, ErrNotConnected)
		}
		if err := p.nc.Publish(subj, data); err != nil {
			return fmt.Errorf("publish %s: %w", subj, err)
		}
		return nil
	}
	start := time.Now() // latency is measured, not simulated: no injected clock
	rec := outboxRecord{ID: id, Subject: subj, Kind: kind, Low: lowPriority(kind, data), Queued: start, Data: data}
	if p.ob.stats().depth == 0 && p.nc.Status() == nats.CONNECTED && p.streamUsable() {
		err := p.send(ctx, subj, id, data)
		if err == nil {
			p.acked.Add(1)
			p.report(PublishResult{Camera: camera, Kind: kind, ID: id, Latency: time.Since(start)})
			return nil
		}
		if permanent(err) {
			p.deadLetter(rec, false, "refused by the server: "+err.Error(), 1)
			return fmt.Errorf("publish %s: %w", subj, err)
		}
		p.log.Debug("publish not acknowledged; queueing in the outbox", "subject", subj, "err", err)
	}
	dropped, err := p.ob.push(rec)
	for range dropped {
		p.report(PublishResult{Kind: alert.KindTarget, Outboxed: true, Err: errors.New("dropped from a full outbox")})
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
	// No retries inside the client on "no responders": the outbox retries,
	// without holding the caller or the messages behind this one.
	_, err := p.js.Publish(actx, subj, data, jetstream.WithMsgID(id), jetstream.WithRetryAttempts(0))
	return err
}

// noStream reports an answer that no stream holds the subject.
func noStream(err error) bool {
	return errors.Is(err, jetstream.ErrNoStreamResponse) || errors.Is(err, nats.ErrNoResponders)
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
// up, removing each message only after its acknowledgement, and tries
// again to create a stream that could not be made. It returns nil when
// ctx ends, after its retry goroutine; queued messages stay on disk.
func (p *Publisher) Run(ctx context.Context) error {
	done := make(chan struct{})
	go func() { defer close(done); p.runRetries(ctx) }()
	defer func() { <-done }()
	t := time.NewTicker(250 * time.Millisecond)
	defer t.Stop()
	for {
		select {
		case <-ctx.Done():
			return nil
		case <-p.wake:
		case <-t.C:
		}
		if !p.streamReady() {
			p.ensureStream(ctx, false) // at most every StreamRetry while faulted
		}
		if err := p.drain(ctx); err != nil && ctx.Err() == nil {
			p.log.Debug("outbox waits", "err", err, "depth", p.ob.stats().depth)
		}
	}
}

// runRetries is the retry lane: it tries, one at a time and each when its
// delay is over, the messages that failed by their own fault and those
// whose subject the stream does not hold. Whatever it waits for, the
// messages in drain's lane do not wait with it.
func (p *Publisher) runRetries(ctx context.Context) {
	t := time.NewTicker(250 * time.Millisecond)
	defer t.Stop()
	for {
		select {
		case <-ctx.Done():
			return
		case <-t.C:
		}
		for _, rec := range p.ob.snapshot() {
			if ctx.Err() != nil || p.nc.Status() != nats.CONNECTED {
				break
			}
			if !p.inRetryLane(rec) || !p.due(rec) {
				continue
			}
			streamErr := p.ensureStream(ctx, false)
			if errors.Is(streamErr, ErrNotConnected) {
				break
			}
			if out, _ := p.try(ctx, rec, streamErr); out == tryBlocked || out == tryBroken {
				break
			}
		}
		if p.ob.stats().depth == 0 {
			p.setBacklog(false)
		}
	}
}

// Outcomes of one try of an outbox message.
const (
	tryDone    = iota // acknowledged, or moved to the dead-letter file
	tryLater          // not acknowledged by its own fault: in the retry lane
	tryBlocked        // the stream, the server or the connection failed: nothing counted
	tryBroken         // the outbox could not be written
)

// drain makes one pass over the outbox, oldest first, sending each
// message of the stream's own subjects that has not failed yet. A message
// that fails by its own fault (see messageAtFault) moves to the retry lane
// (runRetries) and the pass goes on; a failure of the stream or the server
// ends the pass (a timeout at once, so that a slow server does not cost
// AckTimeout per message; others after passFailures in a row) and counts
// against nothing.
func (p *Publisher) drain(ctx context.Context) error {
	p.drainMu.Lock()
	defer p.drainMu.Unlock()
	recs := p.ob.snapshot()
	defer func() {
		if p.ob.stats().depth == 0 {
			p.setBacklog(false)
		}
	}()
	p.pruneRetries(recs)
	var lastErr error
	streak := 0
	for _, rec := range recs {
		if err := ctx.Err(); err != nil {
			return err
		}
		if p.nc.Status() != nats.CONNECTED {
			return ErrNotConnected
		}
		if p.inRetryLane(rec) {
			continue
		}
		streamErr := p.ensureStream(ctx, false)
		if errors.Is(streamErr, ErrNotConnected) {
			return streamErr
		}
		out, err := p.try(ctx, rec, streamErr)
		switch out {
		case tryDone, tryLater:
			streak = 0
		case tryBroken:
			return err
		case tryBlocked:
			lastErr = err
			streak++
			if streak >= passFailures || !noStream(err) {
				return err
			}
		}
	}
	return lastErr
}

// try sends rec once and settles its fate: removed when acknowledged,
// moved to the dead-letter file when refused or out of tries, given a
// retry delay when it failed by its own fault.
func (p *Publisher) try(ctx context.Context, rec outboxRecord, streamErr error) (int, error) {
	err := p.send(ctx, rec.Subject, rec.ID, rec.Data)
	p.retryMu.Lock()
	rs := p.retries[rec.N]
	p.retryMu.Unlock()
	tries := 1
	if rs != nil {
		tries += rs.tries
	}
	switch {
	case err == nil:
		p.acked.Add(1)
		p.forget(rec.N)
		p.report(PublishResult{Kind: rec.Kind, Camera: cameraOf(rec.Subject), ID: rec.ID, Latency: time.Since(rec.Queued), Outboxed: true})
		if err := p.ob.remove(rec.N); err != nil {
			return tryBroken, err
		}
		return tryDone, nil
	case permanent(err):
		p.forget(rec.N)
		if err := p.deadLetter(rec, true, "refused by the server: "+err.Error(), tries); err != nil {
			return tryBroken, err
		}
		return tryDone, nil
	case ctx.Err() != nil || p.nc.Status() != nats.CONNECTED:
		return tryBlocked, err
	case streamErr != nil || !p.messageAtFault(ctx, rec, err):
		return tryBlocked, err
	case tries >= DeadLetterTries:
		p.forget(rec.N)
		reason := fmt.Sprintf("not acknowledged after %d tries over %.1f s: %v", tries, time.Since(rec.Queued).Seconds(), err)
		if err := p.deadLetter(rec, true, reason, tries); err != nil {
			return tryBroken, err
		}
		return tryDone, nil
	}
	p.retryMu.Lock()
	p.retries[rec.N] = &retryState{tries: tries, next: time.Now().Add(retryDelay(tries))}
	p.retryMu.Unlock()
	p.log.Debug("outbox message not acknowledged; tried again later", "subject", rec.Subject, "id", rec.ID, "try", tries, "err", err)
	return tryLater, err
}

// inRetryLane reports whether rec belongs to runRetries: it failed by its
// own fault before, or its subject is not one the stream holds.
func (p *Publisher) inRetryLane(rec outboxRecord) bool {
	p.retryMu.Lock()
	defer p.retryMu.Unlock()
	return p.retries[rec.N] != nil || !p.ours(rec.Subject)
}

// due reports whether rec's retry delay is over.
func (p *Publisher) due(rec outboxRecord) bool {
	p.retryMu.Lock()
	defer p.retryMu.Unlock()
	rs := p.retries[rec.N]
	return rs == nil || !time.Now().Before(rs.next)
}

func (p *Publisher) forget(n uint64) {
	p.retryMu.Lock()
	delete(p.retries, n)
	p.retryMu.Unlock()
}

// pruneRetries forgets the retry state of messages no longer queued.
func (p *Publisher) pruneRetries(recs []outboxRecord) {
	live := make(map[uint64]bool, len(recs))
	for _, r := range recs {
		live[r.N] = true
	}
	p.retryMu.Lock()
	defer p.retryMu.Unlock()
	for n := range p.retries {
		if !live[n] {
			delete(p.retries, n)
		}
	}
}

// messageAtFault reports, after rec failed with err while connected,
// whether the failure is the message's own: no stream at all holds its
// subject (a subject outside the stream's, such as one queued under an
// earlier subject prefix), or the stream answers while this message gets
// no acknowledgement. A stream that is missing, electing a leader or not
// answering is the stream's failure, not the message's.
func (p *Publisher) messageAtFault(ctx context.Context, rec outboxRecord, err error) bool {
	ictx, cancel := context.WithTimeout(ctx, p.cfg.AckTimeout)
	defer cancel()
	if noStream(err) {
		_, serr := p.js.StreamNameBySubject(ictx, rec.Subject)
		if !errors.Is(serr, jetstream.ErrStreamNotFound) {
			return false // a stream holds it but did not answer, or the server did not
		}
		if p.ours(rec.Subject) {
			p.streamLost() // ours is gone: made again before the next send
			return false
		}
		return true
	}
	s, serr := p.js.Stream(ictx, p.cfg.Stream.Name)
	if serr != nil {
		return false
	}
	_, serr = s.Info(ictx)
	return serr == nil
}

// ours reports whether the stream's subjects include subj.
func (p *Publisher) ours(subj string) bool {
	toks := strings.Split(subj, ".")
	return len(toks) == 3 && toks[0] == p.cfg.Prefix && durable(toks[2])
}

// deadLetter moves rec to the dead-letter file (queued: it is in the
// outbox) and reports it lost.
func (p *Publisher) deadLetter(rec outboxRecord, queued bool, reason string, tries int) error {
	var err error
	var rotated bool
	if queued {
		rotated, err = p.ob.deadLetter(rec, reason, tries, time.Now())
	} else {
		rotated, err = p.ob.writeDeadLetter(rec, reason, tries, time.Now())
	}
	file := p.ob.deadLetterPath()
	if p.cfg.Outbox.Dir == "" {
		file = "" // memory-only: the log line is all that is kept
	}
	if rotated {
		p.log.Warn("dead-letter file reached its bound: moved aside, replacing the earlier one; older letters are gone", "file", file, "moved_to", file+".1", "bound_bytes", p.ob.cfg.DeadLetterMaxBytes)
	}
	if err != nil {
		p.log.Error("message could not be moved to the dead-letter file; it stays queued", "subject", rec.Subject, "id", rec.ID, "reason", reason, "err", err)
		return err
	}
	p.log.Error("message moved to the dead-letter file", "file", file, "subject", rec.Subject, "id", rec.ID, "tries", tries, "reason", reason)
	p.report(PublishResult{Kind: rec.Kind, Camera: cameraOf(rec.Subject), ID: rec.ID, Outboxed: queued, Err: errors.New("dead-lettered: " + reason)})
	return nil
}

// cameraOf returns the camera token of PREFIX.CAMERA.KIND, or "" for any
// other shape.
func cameraOf(subject string) string {
	toks := strings.Split(subject, ".")
	if len(toks) != 3 {
		return ""
	}
	return toks[1]
}

// PublishArmed encodes and publishes an armed change to
// PREFIX.CAMERA.armed with ArmedID as its de-duplication id.
func (p *Publisher) PublishArmed(ctx context.Context, c alert.ArmedChange) error {
	b, err := alert.Encode(c)
	if err != nil {
		return err
	}
	return p.Publish(ctx, c.Camera, alert.KindArmed, alert.ArmedID(c), b)
}

// PublishFault encodes and publishes a fault to PREFIX.CAMERA.fault; epoch
// is the sender's start time, part of the de-duplication id (FaultID).
func (p *Publisher) PublishFault(ctx context.Context, f alert.Fault, epoch time.Time) error {
	b, err := alert.Encode(f)
	if err != nil {
		return err
	}
	return p.Publish(ctx, f.Camera, alert.KindFault, alert.FaultID(f, epoch), b)
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
	if n := p.ob.stats().depth; n > 0 {
		return fmt.Errorf("flush outbox: %d messages left, waiting to be tried again", n)
	}
	return p.nc.FlushWithContext(ctx)
}

// Stats returns the current counters.
func (p *Publisher) Stats() Stats {
	o := p.ob.stats()
	return Stats{Depth: o.depth, Bytes: o.bytes, Oldest: o.oldest, Queued: o.queued, Dropped: o.dropped, Refused: o.refused,
		DeadLettered: o.deadLettered, Acked: p.acked.Load(), BeatsLost: p.beatsLost.Load(), Rejected: o.rejected}
}

// Close releases the outbox. It does not close the NATS connection.
func (p *Publisher) Close() error { return p.ob.close() }
