package arming

import (
	"context"
	"sync"
	"time"
)

// Default spacing of a refused client's attempts: after n refusals in a
// row the next attempt waits 200 ms · 2^(n−1), at most 10 s. The figures
// are common practice for slowing password guessing without locking out
// an owner who mistyped.
const (
	DefaultRefusalBase = 200 * time.Millisecond
	DefaultRefusalMax  = 10 * time.Second
)

// throttleForget is how long after its last refusal a client starts
// afresh; maxPeers bounds the clients remembered.
const (
	throttleForget = 15 * time.Minute
	maxPeers       = 4096
)

// Throttle slows a client whose attempts keep being refused. After n
// refusals in a row its next attempt is judged only Base·2^(n−1) later
// (at most Max), and attempts sent meanwhile queue behind one another,
// each a further delay apart, so that sending many at once gains nothing;
// one that would queue longer than Max is refused unjudged. An accepted
// attempt forgets the client's refusals. Other clients are not slowed.
// Safe for concurrent use.
type Throttle struct {
	base, max time.Duration
	now       func() time.Time
	mu        sync.Mutex
	peers     map[string]*peer
}

type peer struct {
	fails int
	next  time.Time // earliest instant the next attempt may be judged
	last  time.Time // latest refusal
}

// NewThrottle returns a Throttle; zero durations take the defaults and a
// nil now is time.Now.
func NewThrottle(base, max time.Duration, now func() time.Time) *Throttle {
	if base <= 0 {
		base = DefaultRefusalBase
	}
	if max < base {
		max = DefaultRefusalMax
	}
	if now == nil {
		now = time.Now
	}
	return &Throttle{base: base, max: max, now: now, peers: map[string]*peer{}}
}

// delay is the spacing after n refusals in a row.
func (t *Throttle) delay(n int) time.Duration {
	if n <= 0 {
		return 0
	}
	if n > 30 {
		return t.max
	}
	d := t.base << (n - 1)
	if d > t.max || d <= 0 {
		return t.max
	}
	return d
}

// Wait blocks until key's attempt may be judged and returns how long it
// waited. ok is false when the attempt is to be refused without judging
// it: the queue ahead is longer than Max, or ctx ended while waiting.
func (t *Throttle) Wait(ctx context.Context, key string) (waited time.Duration, ok bool) {
	t.mu.Lock()
	now := t.now()
	p := t.peers[key]
	if p != nil && now.Sub(p.last) > throttleForget {
		delete(t.peers, key)
		p = nil
	}
	if p == nil {
		t.mu.Unlock()
		return 0, true
	}
	slot := p.next
	if slot.Before(now) {
		slot = now
	}
	d := slot.Sub(now)
	if d > t.max {
		t.mu.Unlock()
		return 0, false
	}
	p.next = slot.Add(t.delay(p.fails))
	t.mu.Unlock()
	if d <= 0 {
		return 0, true
	}
	tm := time.NewTimer(d)
	defer tm.Stop()
	select {
	case <-ctx.Done():
		return d, false
	case <-tm.C:
		return d, true
	}
}

// Pending reports whether key's next attempt would have to wait.
func (t *Throttle) Pending(key string) bool {
	t.mu.Lock()
	defer t.mu.Unlock()
	p := t.peers[key]
	return p != nil && p.next.After(t.now())
}

// Refused records a refused attempt of key.
func (t *Throttle) Refused(key string) {
	t.mu.Lock()
	defer t.mu.Unlock()
	now := t.now()
	p := t.peers[key]
	if p == nil {
		t.makeRoom(now)
		p = &peer{}
		t.peers[key] = p
	}
	p.fails++
	p.last = now
	if next := now.Add(t.delay(p.fails)); next.After(p.next) {
		p.next = next
	}
}

// Accepted forgets key's refusals.
func (t *Throttle) Accepted(key string) {
	t.mu.Lock()
	delete(t.peers, key)
	t.mu.Unlock()
}

// makeRoom keeps the table under maxPeers: clients idle past
// throttleForget go first, then the one refused longest ago. The caller
// holds mu.
func (t *Throttle) makeRoom(now time.Time) {
	if len(t.peers) < maxPeers {
		return
	}
	oldest, at := "", now
	for k, p := range t.peers {
		if now.Sub(p.last) > throttleForget {
			delete(t.peers, k)
			continue
		}
		if p.last.Before(at) {
			oldest, at = k, p.last
		}
	}
	if len(t.peers) >= maxPeers {
		delete(t.peers, oldest)
	}
}
