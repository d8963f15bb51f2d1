package alert

import (
	"bufio"
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
	"io/fs"
	"os"
	"path/filepath"
	"sync"
	"syscall"
	"time"
)

// OutboxConfig bounds the on-disk queue of messages that the bus has not
// acknowledged yet.
//
// Overflow policy: when a new message does not fit, the oldest
// low-priority messages (target "update" events, which a later update
// supersedes) are dropped, one by one, until it fits. If that is not
// enough, the new message is refused with ErrOutboxFull. Nothing else is
// ever dropped: start, cleared, fault and armed messages stay queued until
// acknowledged. Drops and refusals are counted in Stats.
type OutboxConfig struct {
	// Dir holds outbox.log and outbox.lock. Empty keeps the queue in
	// memory only, so it does not survive a restart.
	Dir string
	// MaxMessages bounds the queue length; default 10000.
	MaxMessages int
	// MaxBytes bounds the payload bytes queued; default 16 MiB.
	MaxBytes int64
}

func (c OutboxConfig) withDefaults() OutboxConfig {
	if c.MaxMessages <= 0 {
		c.MaxMessages = 10000
	}
	if c.MaxBytes <= 0 {
		c.MaxBytes = 16 << 20
	}
	return c
}

// outboxRecord is one line of outbox.log: a queued message, or a tombstone
// (Done or Drop) for an earlier one.
type outboxRecord struct {
	N       uint64    `json:"n,omitempty"`
	ID      string    `json:"id,omitempty"`
	Subject string    `json:"subj,omitempty"`
	Kind    string    `json:"kind,omitempty"`
	Low     bool      `json:"low,omitempty"` // dropped first on overflow
	Queued  time.Time `json:"at,omitzero"`
	Data    []byte    `json:"data,omitempty"`
	Done    uint64    `json:"done,omitempty"` // record Done was acknowledged
	Drop    uint64    `json:"drop,omitempty"` // record Drop was dropped on overflow
}

// outbox is an append-only log of records with tombstones, kept compact:
// it is truncated whenever the queue empties and rewritten when dead
// records dominate. Safe for concurrent use.
type outbox struct {
	cfg OutboxConfig

	mu      sync.Mutex
	f       *os.File // nil when memory-only
	lock    *os.File
	path    string
	live    []outboxRecord
	bytes   int64
	next    uint64
	written int64 // bytes in the log file

	dropped, refused, queued uint64
	corrupt                  int // unreadable lines skipped when opening
}

// openOutbox opens (or creates) the outbox in cfg.Dir, reads what a
// previous run left and takes an exclusive lock on the directory.
func openOutbox(cfg OutboxConfig) (*outbox, error) {
	o := &outbox{cfg: cfg.withDefaults(), next: 1}
	if cfg.Dir == "" {
		return o, nil
	}
	if err := os.MkdirAll(cfg.Dir, 0o750); err != nil {
		return nil, fmt.Errorf("outbox %s: %w", cfg.Dir, err)
	}
	lock, err := os.OpenFile(filepath.Join(cfg.Dir, "outbox.lock"), os.O_CREATE|os.O_RDWR, 0o640)
	if err != nil {
		return nil, fmt.Errorf("outbox %s: lock: %w", cfg.Dir, err)
	}
	if err := syscall.Flock(int(lock.Fd()), syscall.LOCK_EX|syscall.LOCK_NB); err != nil {
		lock.Close()
		return nil, fmt.Errorf("outbox %s: another process holds it (%v); give each daemon its own data_dir", cfg.Dir, err)
	}
	o.lock = lock
	o.path = filepath.Join(cfg.Dir, "outbox.log")
	if err := o.load(); err != nil {
		lock.Close()
		return nil, err
	}
	if err := o.rewrite(); err != nil {
		lock.Close()
		return nil, err
	}
	return o, nil
}

// load reads the log. A torn last line (a crash mid-append) is ignored; a
// bad line elsewhere is skipped and counted, since the rest still holds
// messages worth delivering.
func (o *outbox) load() error {
	data, err := os.ReadFile(o.path)
	if errors.Is(err, fs.ErrNotExist) {
		return nil
	}
	if err != nil {
		return fmt.Errorf("outbox %s: %w", o.path, err)
	}
	byN := map[uint64]outboxRecord{}
	var order []uint64
	lines := bytes.Split(data, []byte("\n"))
	for i, line := range lines {
		if len(bytes.TrimSpace(line)) == 0 {
			continue
		}
		var r outboxRecord
		if err := json.Unmarshal(line, &r); err != nil {
			if i == len(lines)-1 {
				continue // torn final append; that message was never reported queued
			}
			o.corrupt++
			continue
		}
		switch {
		case r.Done != 0:
			delete(byN, r.Done)
		case r.Drop != 0:
			delete(byN, r.Drop)
		case r.N != 0:
			if _, dup := byN[r.N]; !dup {
				order = append(order, r.N)
			}
			byN[r.N] = r
			if r.N >= o.next {
				o.next = r.N + 1
			}
		default:
			o.corrupt++
		}
	}
	for _, n := range order {
		if r, ok := byN[n]; ok {
			o.live = append(o.live, r)
			o.bytes += int64(len(r.Data))
		}
	}
	return nil
}

// rewrite replaces the log with the live records only, atomically.
func (o *outbox) rewrite() error {
	if o.f != nil {
		o.f.Close()
		o.f = nil
	}
	tmp, err := os.CreateTemp(o.cfg.Dir, ".outbox.*.tmp")
	if err != nil {
		return fmt.Errorf("outbox %s: %w", o.cfg.Dir, err)
	}
	defer os.Remove(tmp.Name())
	w := bufio.NewWriter(tmp)
	var n int64
	for _, r := range o.live {
		b, err := json.Marshal(r)
		if err != nil {
			tmp.Close()
			return fmt.Errorf("outbox: encode record: %w", err)
		}
		w.Write(b)
		w.WriteByte('\n')
		n += int64(len(b)) + 1
	}
	if err := w.Flush(); err != nil {
		tmp.Close()
		return fmt.Errorf("outbox %s: write: %w", o.cfg.Dir, err)
	}
	if err := tmp.Sync(); err != nil {
		tmp.Close()
		return fmt.Errorf("outbox %s: sync: %w", o.cfg.Dir, err)
	}
	if err := tmp.Close(); err != nil {
		return fmt.Errorf("outbox %s: %w", o.cfg.Dir, err)
	}
	if err := os.Rename(tmp.Name(), o.path); err != nil {
		return fmt.Errorf("outbox %s: %w", o.path, err)
	}
	if err := syncDir(o.cfg.Dir); err != nil {
		return fmt.Errorf("outbox %s: %w", o.cfg.Dir, err)
	}
	f, err := os.OpenFile(o.path, os.O_WRONLY|os.O_APPEND, 0o640)
	if err != nil {
		return fmt.Errorf("outbox %s: %w", o.path, err)
	}
	o.f, o.written = f, n
	return nil
}

func syncDir(dir string) error {
	d, err := os.Open(dir)
	if err != nil {
		return err
	}
	defer d.Close()
	return d.Sync()
}

// appendLine writes records to the log; sync makes them durable first.
func (o *outbox) appendLine(sync bool, recs ...outboxRecord) error {
	if o.f == nil {
		return nil
	}
	var buf bytes.Buffer
	for _, r := range recs {
		b, err := json.Marshal(r)
		if err != nil {
			return fmt.Errorf("outbox: encode record: %w", err)
		}
		buf.Write(b)
		buf.WriteByte('\n')
	}
	n, err := o.f.Write(buf.Bytes())
	o.written += int64(n)
	if err != nil {
		return fmt.Errorf("outbox %s: append: %w", o.path, err)
	}
	if sync {
		if err := o.f.Sync(); err != nil {
			return fmt.Errorf("outbox %s: sync: %w", o.path, err)
		}
	}
	return nil
}

// push queues r, applying the overflow policy. It returns the number of
// low-priority messages dropped to make room.
func (o *outbox) push(r outboxRecord) (dropped int, err error) {
	o.mu.Lock()
	defer o.mu.Unlock()
	size := int64(len(r.Data))
	if size > o.cfg.MaxBytes {
		o.refused++
		return 0, fmt.Errorf("%w: message of %d bytes exceeds the outbox bound of %d bytes", ErrOutboxFull, size, o.cfg.MaxBytes)
	}
	var drops []int
	count, bytes := len(o.live), o.bytes
	for i := 0; i < len(o.live) && (count+1 > o.cfg.MaxMessages || bytes+size > o.cfg.MaxBytes); i++ {
		if o.live[i].Low {
			drops = append(drops, i)
			count--
			bytes -= int64(len(o.live[i].Data))
		}
	}
	if count+1 > o.cfg.MaxMessages || bytes+size > o.cfg.MaxBytes {
		o.refused++
		return 0, fmt.Errorf("%w: %d messages, %d bytes queued, none of low priority to drop", ErrOutboxFull, len(o.live), o.bytes)
	}
	r.N = o.next
	var lines []outboxRecord
	for _, i := range drops {
		lines = append(lines, outboxRecord{Drop: o.live[i].N})
	}
	lines = append(lines, r)
	if err := o.appendLine(true, lines...); err != nil {
		return 0, err
	}
	o.next++
	if len(drops) > 0 {
		keep := o.live[:0]
		j := 0
		for i, x := range o.live {
			if j < len(drops) && drops[j] == i {
				j++
				continue
			}
			keep = append(keep, x)
		}
		o.live = keep
		o.dropped += uint64(len(drops))
	}
	o.live = append(o.live, r)
	o.bytes = bytes + size
	o.queued++
	return len(drops), nil
}

// head returns the oldest queued record.
func (o *outbox) head() (outboxRecord, bool) {
	o.mu.Lock()
	defer o.mu.Unlock()
	if len(o.live) == 0 {
		return outboxRecord{}, false
	}
	return o.live[0], true
}

// remove takes record n off the queue after it was acknowledged (or
// failed for good). The tombstone is not synced: if it is lost in a crash
// the message is sent once more and the stream's de-duplication drops it.
func (o *outbox) remove(n uint64) error {
	o.mu.Lock()
	defer o.mu.Unlock()
	for i, r := range o.live {
		if r.N != n {
			continue
		}
		o.live = append(o.live[:i], o.live[i+1:]...)
		o.bytes -= int64(len(r.Data))
		if len(o.live) == 0 && o.f != nil {
			// Empty: start the log afresh rather than keep tombstones.
			if err := o.f.Truncate(0); err != nil {
				return fmt.Errorf("outbox %s: truncate: %w", o.path, err)
			}
			o.written = 0
			return nil
		}
		if err := o.appendLine(false, outboxRecord{Done: n}); err != nil {
			return err
		}
		if o.f != nil && o.written > 4*o.bytes+(1<<20) {
			return o.rewrite()
		}
		return nil
	}
	return nil
}

type outboxStats struct {
	depth                    int
	bytes                    int64
	oldest                   time.Time
	dropped, refused, queued uint64
	corrupt                  int
}

func (o *outbox) stats() outboxStats {
	o.mu.Lock()
	defer o.mu.Unlock()
	s := outboxStats{depth: len(o.live), bytes: o.bytes, dropped: o.dropped, refused: o.refused, queued: o.queued, corrupt: o.corrupt}
	if len(o.live) > 0 {
		s.oldest = o.live[0].Queued
	}
	return s
}

// close releases the file and the directory lock; queued records stay on
// disk for the next open.
func (o *outbox) close() error {
	o.mu.Lock()
	defer o.mu.Unlock()
	var err error
	if o.f != nil {
		err = o.f.Close()
		o.f = nil
	}
	if o.lock != nil {
		o.lock.Close()
		o.lock = nil
	}
	return err
}
