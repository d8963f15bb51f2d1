package bus

import (
	"bufio"
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
	"io/fs"
	"math"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"syscall"
	"time"
	"unicode"
	"unicode/utf8"

	"stillwater/alert"
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
	// Dir holds outbox.log and outbox.lock, and beside them the records
	// set aside: outbox.log.rejected (lines that failed validation when the
	// log was read) and DeadLetterFile (messages the server refused or
	// never acknowledged). Empty keeps the queue in memory only, so it does
	// not survive a restart.
	Dir string
	// MaxMessages bounds the queue length; default 10000.
	MaxMessages int
	// MaxBytes bounds the payload bytes queued; default 16 MiB.
	MaxBytes int64
	// DeadLetterMaxBytes bounds DeadLetterFile; default 64 MiB. A letter
	// that would take it past the bound first moves the file to
	// DeadLetterFile+".1" (replacing the one there) and starts it afresh,
	// so the two never hold much more than twice the bound and the newest
	// letters are always kept.
	DeadLetterMaxBytes int64
}

func (c OutboxConfig) withDefaults() OutboxConfig {
	if c.MaxMessages <= 0 {
		c.MaxMessages = 10000
	}
	if c.MaxBytes <= 0 {
		c.MaxBytes = 16 << 20
	}
	if c.DeadLetterMaxBytes <= 0 {
		c.DeadLetterMaxBytes = 64 << 20
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

	dropped, refused, queued, deadLettered uint64

	// rejected are the lines set aside when the log was read, for the
	// publisher to log once.
	rejected []rejectedLine
}

// Limits of one outbox record, checked when it is queued and when the log
// is read back. Subjects and ids are far shorter in practice: a camera id
// is one subject token, an id is the camera, a time and a sequence number.
const (
	maxSubjectLen = 512
	maxIDLen      = 512
)

// rejectedLine is one line of outbox.log.rejected: a line of the log that
// did not hold a valid record, kept as it was, with why.
type rejectedLine struct {
	At     time.Time `json:"at,omitzero"` // when it was set aside
	Line   int       `json:"line"`        // 1-based line number in outbox.log
	Reason string    `json:"reason"`
	Raw    string    `json:"raw,omitempty"`        // the line, when it is valid UTF-8
	RawB64 []byte    `json:"raw_base64,omitempty"` // the line, when it is not
	Torn   bool      `json:"torn,omitempty"`       // an unfinished last line: a crash mid-append
}

// DeadLetterFile is the name, in the outbox directory, of the file of
// messages the server refused or never acknowledged: one DeadLetter as
// JSON per line.
const DeadLetterFile = "dead-letter.jsonl"

// DeadLetter is a message moved out of the outbox because the server
// refused it or never acknowledged it, with the original subject, id and
// payload, so that it can be inspected or sent again by hand.
type DeadLetter struct {
	At      time.Time `json:"at"` // when it was moved aside
	Reason  string    `json:"reason"`
	Tries   int       `json:"tries"`
	Subject string    `json:"subject"`
	Kind    string    `json:"kind"`
	ID      string    `json:"id"`
	Queued  time.Time `json:"queued,omitzero"`
	// Payload is the message as it was, when it is JSON; PayloadB64
	// otherwise.
	Payload    json.RawMessage `json:"payload,omitempty"`
	PayloadB64 []byte          `json:"payload_base64,omitempty"`
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
	// The lines set aside are saved before the rewrite drops them from
	// the log: nothing that was on disk is lost.
	if err := o.saveRejected(); err != nil {
		lock.Close()
		return nil, err
	}
	if err := o.rewrite(); err != nil {
		lock.Close()
		return nil, err
	}
	return o, nil
}

// load reads the log and keeps the valid records; see parseOutbox.
func (o *outbox) load() error {
	data, err := os.ReadFile(o.path)
	if errors.Is(err, fs.ErrNotExist) {
		return nil
	}
	if err != nil {
		return fmt.Errorf("outbox %s: %w", o.path, err)
	}
	live, rejected, next := parseOutbox(data, o.cfg.MaxBytes, time.Now())
	o.live, o.rejected = live, rejected
	if next > o.next {
		o.next = next
	}
	for _, r := range live {
		o.bytes += int64(len(r.Data))
	}
	return nil
}

// parseOutbox reads an outbox log: queued records and the tombstones of
// those acknowledged or dropped since. It returns the records still
// queued, in order; the lines that are not a valid record or tombstone,
// each with the reason; and the next free record number. A record with no
// queue time is given now. It never fails: a bad line costs that line
// only.
func parseOutbox(data []byte, maxBytes int64, now time.Time) (live []outboxRecord, rejected []rejectedLine, next uint64) {
	next = 1
	byN := map[uint64]outboxRecord{}
	var order []uint64
	lines := bytes.Split(data, []byte("\n"))
	for i, line := range lines {
		if len(bytes.TrimSpace(line)) == 0 {
			continue
		}
		reject := func(reason string) {
			rl := rejectedLine{Line: i + 1, Reason: reason}
			if utf8.Valid(line) {
				rl.Raw = string(line)
			} else {
				rl.RawB64 = bytes.Clone(line)
			}
			rejected = append(rejected, rl)
		}
		var r outboxRecord
		if err := json.Unmarshal(line, &r); err != nil {
			if i == len(lines)-1 {
				reject("torn final line, cut short by a crash while it was written: " + err.Error())
				rejected[len(rejected)-1].Torn = true
				continue
			}
			reject("not a JSON record: " + err.Error())
			continue
		}
		switch {
		case r.Done != 0 || r.Drop != 0:
			if r.N != 0 {
				reject("both a message and a tombstone")
				continue
			}
			delete(byN, r.Done)
			delete(byN, r.Drop)
		default:
			if err := r.validate(maxBytes); err != nil {
				reject(err.Error())
				continue
			}
			if r.Queued.IsZero() {
				r.Queued = now
			}
			if _, dup := byN[r.N]; !dup {
				order = append(order, r.N)
			}
			byN[r.N] = r
			if r.N >= next {
				next = r.N + 1
			}
		}
	}
	for _, n := range order {
		if r, ok := byN[n]; ok {
			live = append(live, r)
		}
	}
	return live, rejected, next
}

// validate checks a queued record: what a Publish of a durable kind could
// have written. maxBytes bounds the payload.
func (r outboxRecord) validate(maxBytes int64) error {
	switch {
	case r.N == 0:
		return errors.New("no record number (n)")
	case r.N == math.MaxUint64:
		return errors.New("record number (n) at its maximum")
	case !durable(r.Kind):
		return fmt.Errorf("kind %q is none of %s, %s, %s, %s", r.Kind, alert.KindTarget, alert.KindCleared, alert.KindFault, alert.KindArmed)
	case r.ID == "":
		return errors.New("empty id")
	case len(r.ID) > maxIDLen:
		return fmt.Errorf("id of %d bytes, over %d", len(r.ID), maxIDLen)
	case !printable(r.ID):
		return fmt.Errorf("id %q holds control characters or invalid UTF-8", r.ID)
	case len(r.Data) == 0:
		return errors.New("empty payload")
	case int64(len(r.Data)) > maxBytes:
		return fmt.Errorf("payload of %d bytes, over the outbox bound of %d", len(r.Data), maxBytes)
	case !json.Valid(r.Data):
		return errors.New("payload is not JSON")
	case bytes.TrimSpace(r.Data)[0] != '{':
		return errors.New("payload is not a JSON object")
	}
	return validSubject(r.Subject, r.Kind)
}

// validSubject checks that subj is PREFIX.CAMERA.KIND with kind last.
func validSubject(subj, kind string) error {
	if subj == "" {
		return errors.New("empty subject")
	}
	if len(subj) > maxSubjectLen {
		return fmt.Errorf("subject of %d bytes, over %d", len(subj), maxSubjectLen)
	}
	if !printable(subj) {
		return fmt.Errorf("subject %q holds control characters or invalid UTF-8", subj)
	}
	toks := strings.Split(subj, ".")
	if len(toks) != 3 {
		return fmt.Errorf("subject %q: want PREFIX.CAMERA.KIND, three tokens", subj)
	}
	for _, t := range toks {
		if err := alert.ValidToken(t); err != nil {
			return fmt.Errorf("subject %q: token %v", subj, err)
		}
	}
	if toks[2] != kind {
		return fmt.Errorf("subject %q does not end in its kind %q", subj, kind)
	}
	return nil
}

// printable reports whether s is valid UTF-8 without control characters.
func printable(s string) bool {
	if !utf8.ValidString(s) {
		return false
	}
	for _, c := range s {
		if unicode.IsControl(c) {
			return false
		}
	}
	return true
}

// saveRejected appends the lines set aside by load to outbox.log.rejected
// and syncs it.
func (o *outbox) saveRejected() error {
	if len(o.rejected) == 0 {
		return nil
	}
	var buf bytes.Buffer
	at := time.Now().UTC()
	for _, r := range o.rejected {
		r.At = at
		b, err := json.Marshal(r)
		if err != nil {
			return fmt.Errorf("outbox: encode rejected line %d: %w", r.Line, err)
		}
		buf.Write(b)
		buf.WriteByte('\n')
	}
	if err := appendSynced(o.rejectedPath(), buf.Bytes()); err != nil {
		return fmt.Errorf("outbox: set aside %d invalid lines: %w", len(o.rejected), err)
	}
	return nil
}

func (o *outbox) rejectedPath() string { return o.path + ".rejected" }

// appendSynced appends b to the file at path, creating it, and syncs it.
func appendSynced(path string, b []byte) error {
	f, err := os.OpenFile(path, os.O_CREATE|os.O_WRONLY|os.O_APPEND, 0o640)
	if err != nil {
		return err
	}
	if _, err := f.Write(b); err != nil {
		f.Close()
		return err
	}
	if err := f.Sync(); err != nil {
		f.Close()
		return err
	}
	return f.Close()
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
	r.N = o.next
	if err := r.validate(o.cfg.MaxBytes); err != nil {
		return 0, fmt.Errorf("outbox: %w", err)
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

// snapshot returns the queued records, oldest first.
func (o *outbox) snapshot() []outboxRecord {
	o.mu.Lock()
	defer o.mu.Unlock()
	return append([]outboxRecord(nil), o.live...)
}

// deadLetter writes r with why to the dead-letter file, synced, then takes
// it off the queue. Memory-only outboxes keep no file. rotated is true
// when the file had reached its bound and was moved aside first.
func (o *outbox) deadLetter(r outboxRecord, reason string, tries int, at time.Time) (rotated bool, err error) {
	if rotated, err = o.writeDeadLetter(r, reason, tries, at); err != nil {
		return rotated, err
	}
	return rotated, o.remove(r.N)
}

// writeDeadLetter appends r with why to the dead-letter file, synced, and
// counts it; rotated as for deadLetter.
func (o *outbox) writeDeadLetter(r outboxRecord, reason string, tries int, at time.Time) (rotated bool, err error) {
	if o.cfg.Dir == "" {
		o.mu.Lock()
		o.deadLettered++
		o.mu.Unlock()
		return false, nil
	}
	d := DeadLetter{At: at.UTC(), Reason: reason, Tries: tries, Subject: r.Subject, Kind: r.Kind, ID: r.ID, Queued: r.Queued}
	if json.Valid(r.Data) {
		d.Payload = json.RawMessage(r.Data)
	} else {
		d.PayloadB64 = r.Data
	}
	b, err := json.Marshal(d)
	if err != nil {
		return false, fmt.Errorf("outbox: encode dead letter %s: %w", r.ID, err)
	}
	b = append(b, '\n')
	o.mu.Lock()
	defer o.mu.Unlock()
	path := o.deadLetterPath()
	if st, err := os.Stat(path); err == nil && st.Size() > 0 && st.Size()+int64(len(b)) > o.cfg.DeadLetterMaxBytes {
		if err := os.Rename(path, path+".1"); err != nil {
			return false, fmt.Errorf("outbox: dead letter %s: move the full file aside: %w", r.ID, err)
		}
		rotated = true
	}
	if err := appendSynced(path, b); err != nil {
		return rotated, fmt.Errorf("outbox: dead letter %s: %w", r.ID, err)
	}
	o.deadLettered++
	return rotated, nil
}

func (o *outbox) deadLetterPath() string { return filepath.Join(o.cfg.Dir, DeadLetterFile) }

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
	depth                                  int
	bytes                                  int64
	oldest                                 time.Time
	dropped, refused, queued, deadLettered uint64
	rejected                               int
}

func (o *outbox) stats() outboxStats {
	o.mu.Lock()
	defer o.mu.Unlock()
	s := outboxStats{depth: len(o.live), bytes: o.bytes, dropped: o.dropped, refused: o.refused, queued: o.queued,
		deadLettered: o.deadLettered, rejected: len(o.rejected)}
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
