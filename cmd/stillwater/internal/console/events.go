package console

import (
	"encoding/json"
	"fmt"
	"io/fs"
	"path"
	"strings"
	"sync"
	"unicode"
	"unicode/utf8"

	"stillwater/alert"
)

// Recorder keeps the latest alarms and faults the daemon publishes, and
// each camera's active faults, in memory. Feed it every outgoing message;
// safe for concurrent use.
type Recorder struct {
	mu     sync.Mutex
	ring   []Event // oldest first once full, from next
	next   int
	full   bool
	active map[string]map[string]Fault // camera → fault kind → fault
}

// NewRecorder keeps the latest size events (at least 1).
func NewRecorder(size int) *Recorder {
	return &Recorder{ring: make([]Event, max(size, 1)), active: map[string]map[string]Fault{}}
}

// Message records one published message of the given kind (an alert.Kind*
// constant). Targets that start an alarm, clears and faults become events;
// target updates, heartbeats and armed changes are ignored. A message that
// does not decode is an error naming its kind, and nothing is recorded.
func (r *Recorder) Message(kind string, data []byte) error {
	switch kind {
	case alert.KindTarget:
		var t alert.Target
		if err := json.Unmarshal(data, &t); err != nil {
			return fmt.Errorf("record %s message: %w", kind, err)
		}
		if t.Event != "start" {
			return nil
		}
		pos := [2]float64{t.Surface.X, t.Surface.Y}
		e := Event{
			ID: fmt.Sprintf("%s-%d-alarm", t.Camera, t.Seq), Kind: EventAlarm, Camera: t.Camera, Time: t.FrameTime,
			Text:  fmt.Sprintf("Someone in the water while armed: track %d, %.0f %% sure, in view for %.1f s.", t.Track, 100*t.Confidence, t.Dwell),
			Track: t.Track, Position: &pos, Snapshot: evidenceName(t.Evidence),
		}
		r.add(e)
	case alert.KindCleared:
		var c alert.Cleared
		if err := json.Unmarshal(data, &c); err != nil {
			return fmt.Errorf("record %s message: %w", kind, err)
		}
		pos := [2]float64{c.Last.X, c.Last.Y}
		r.add(Event{
			ID: fmt.Sprintf("%s-%d-cleared", c.Camera, c.Seq), Kind: EventAlarmCleared, Camera: c.Camera, Time: c.FrameTime,
			Text:  fmt.Sprintf("Track %d no longer seen, after %.1f s.", c.Track, c.Duration),
			Track: c.Track, Position: &pos,
		})
	case alert.KindFault:
		var f alert.Fault
		if err := json.Unmarshal(data, &f); err != nil {
			return fmt.Errorf("record %s message: %w", kind, err)
		}
		k := EventFaultCleared
		if f.Active {
			k = EventFault
		}
		r.mu.Lock()
		if r.active[f.Camera] == nil {
			r.active[f.Camera] = map[string]Fault{}
		}
		if f.Active {
			if _, on := r.active[f.Camera][f.Fault]; !on {
				r.active[f.Camera][f.Fault] = Fault{Kind: f.Fault, Detail: sentence(f.Message), Since: f.Time}
			}
		} else {
			delete(r.active[f.Camera], f.Fault)
		}
		r.mu.Unlock()
		r.add(Event{ID: fmt.Sprintf("%s-%d-fault", f.Camera, f.Seq), Kind: k, Camera: f.Camera, Time: f.Time, Text: sentence(f.Message)})
	}
	return nil
}

// evidenceName turns a target's evidence path (relative to the data
// directory, "evidence/NAME.jpg") into a name in the evidence directory.
func evidenceName(p string) string {
	if p == "" {
		return ""
	}
	p = path.Clean(strings.ReplaceAll(p, "\\", "/"))
	return strings.TrimPrefix(p, "evidence/")
}

// sentence starts s with a capital and ends it with a full stop.
func sentence(s string) string {
	s = strings.TrimSpace(s)
	if s == "" {
		return s
	}
	r, n := utf8.DecodeRuneInString(s)
	s = string(unicode.ToUpper(r)) + s[n:]
	if !strings.HasSuffix(s, ".") {
		s += "."
	}
	return s
}

func (r *Recorder) add(e Event) {
	r.mu.Lock()
	defer r.mu.Unlock()
	r.ring[r.next] = e
	r.next = (r.next + 1) % len(r.ring)
	if r.next == 0 {
		r.full = true
	}
}

// Events returns at most n events, newest first.
func (r *Recorder) Events(n int) []Event {
	r.mu.Lock()
	defer r.mu.Unlock()
	count := r.next
	if r.full {
		count = len(r.ring)
	}
	out := make([]Event, 0, min(n, count))
	for i := 1; i <= count && len(out) < n; i++ {
		out = append(out, r.ring[(r.next-i+len(r.ring))%len(r.ring)])
	}
	return out
}

// Faults returns a camera's active faults, oldest first.
func (r *Recorder) Faults(camera string) []Fault {
	r.mu.Lock()
	defer r.mu.Unlock()
	out := []Fault{}
	for _, f := range r.active[camera] {
		out = append(out, f)
	}
	for i := 1; i < len(out); i++ {
		for j := i; j > 0 && (out[j].Since.Before(out[j-1].Since) || out[j].Since.Equal(out[j-1].Since) && out[j].Kind < out[j-1].Kind); j-- {
			out[j], out[j-1] = out[j-1], out[j]
		}
	}
	return out
}

// WithEvidence checks each alarm's evidence in the evidence directory: a
// snapshot retention has removed is no longer offered, and the clip is
// the snapshot's name with .mp4 or .avi, once written.
func WithEvidence(events []Event, fsys fs.FS) []Event {
	if fsys == nil {
		return events
	}
	out := make([]Event, len(events))
	for i, e := range events {
		out[i] = e
		if e.Snapshot == "" || !fs.ValidPath(e.Snapshot) {
			continue
		}
		if _, err := fs.Stat(fsys, e.Snapshot); err != nil {
			out[i].Snapshot = "" // removed by retention
		}
		base := strings.TrimSuffix(e.Snapshot, path.Ext(e.Snapshot))
		for _, ext := range []string{".mp4", ".avi"} {
			if st, err := fs.Stat(fsys, base+ext); err == nil && !st.IsDir() {
				out[i].Clip = base + ext
				break
			}
		}
	}
	return out
}
