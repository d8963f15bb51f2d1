package alert

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io/fs"
	"os"
	"sort"
	"sync"
	"time"
)

// AllCameras addresses every camera in Arming calls and control requests.
const AllCameras = "all"

// forever is the Until of an override set without an end.
func forever() time.Time { return time.Date(9999, 12, 31, 0, 0, 0, 0, time.UTC) }

// ReservedCamera returns an error for camera ids that clash with the
// control API: "all" addresses every camera and "control" is the subject
// token of control requests (PREFIX.control.ACTION).
func ReservedCamera(id string) error {
	switch id {
	case AllCameras:
		return fmt.Errorf("camera id %q is reserved for addressing every camera", id)
	case "control":
		return fmt.Errorf("camera id %q is reserved: PREFIX.control.* carries control requests", id)
	}
	return nil
}

// ArmingConfig sets up per-camera arming.
type ArmingConfig struct {
	// Cameras are the camera ids; "all" addresses every one of them.
	Cameras []string
	// Default is the schedule of cameras without their own; nil is armed
	// around the clock.
	Default *Schedule
	// Schedules are per-camera schedules by camera id.
	Schedules map[string]*Schedule
	// StatePath is the JSON file that keeps overrides across restarts;
	// empty keeps them in memory only.
	StatePath string
	// MaxDisarm is the longest a disarm may last; default 24 h. A disarm
	// always ends, so a forgotten one cannot leave the pool unwatched.
	MaxDisarm time.Duration
}

// Arming holds one ArmState per camera and the overrides operators set.
// Safe for concurrent use.
type Arming struct {
	cfg     ArmingConfig
	mu      sync.Mutex
	states  map[string]*ArmState
	ids     []string // sorted
	sent    map[string]sentState
	setAt   map[string]time.Time // when an operator last changed a camera, for Poll
	polled  time.Time
	changed chan struct{}
}

type sentState struct {
	armed    bool
	override Override
}

// CameraArming is one camera's row of a status snapshot.
type CameraArming struct {
	Camera   string          `json:"camera"`
	Armed    bool            `json:"armed"`
	Reason   string          `json:"reason"`
	FailSafe bool            `json:"fail_safe,omitempty"`
	Override *OverrideStatus `json:"override,omitempty"`
	// NextChange is the next instant the schedule or the override changes
	// the state by itself; nil when it never does.
	NextChange *time.Time `json:"next_change,omitempty"`
}

// OverrideStatus describes an active override; Until is nil for an arm
// without an end.
type OverrideStatus struct {
	Armed bool       `json:"armed"`
	Until *time.Time `json:"until,omitempty"`
	By    string     `json:"by,omitempty"`
}

// ArmingStatus is a snapshot of every camera at Time (UTC).
type ArmingStatus struct {
	Time    time.Time      `json:"time"`
	Cameras []CameraArming `json:"cameras"`
}

// armingFile is the state file's form.
type armingFile struct {
	V         int                 `json:"v"`
	Overrides map[string]Override `json:"overrides"`
}

// NewArming builds the per-camera states and loads saved overrides from
// cfg.StatePath. A missing file is no override. A file that cannot be read
// or parsed leaves every camera armed in fail-safe (its reason says so)
// until an operator sets or clears its state: NewArming then returns the
// usable *Arming together with an error wrapping ErrStateUnreadable, which
// the caller should log loudly and go on.
func NewArming(cfg ArmingConfig, now time.Time) (*Arming, error) {
	if len(cfg.Cameras) == 0 {
		return nil, errors.New("arming: no cameras")
	}
	if cfg.MaxDisarm <= 0 {
		cfg.MaxDisarm = 24 * time.Hour
	}
	a := &Arming{cfg: cfg, states: map[string]*ArmState{}, sent: map[string]sentState{}, setAt: map[string]time.Time{}, changed: make(chan struct{}, 1)}
	for _, id := range cfg.Cameras {
		if err := ValidToken(id); err != nil {
			return nil, fmt.Errorf("arming: camera %q: %v", id, err)
		}
		if err := ReservedCamera(id); err != nil {
			return nil, fmt.Errorf("arming: %w", err)
		}
		if _, dup := a.states[id]; dup {
			return nil, fmt.Errorf("arming: camera %q listed twice", id)
		}
		sched := cfg.Default
		if s, ok := cfg.Schedules[id]; ok && s != nil {
			sched = s
		}
		a.states[id] = NewArmState(sched)
		a.ids = append(a.ids, id)
	}
	for id := range cfg.Schedules {
		if _, ok := a.states[id]; !ok {
			return nil, fmt.Errorf("arming: schedule for unknown camera %q", id)
		}
	}
	sort.Strings(a.ids)
	a.polled = now
	if cfg.StatePath == "" {
		return a, nil
	}
	if err := a.load(); err != nil {
		for _, s := range a.states {
			s.override, s.failSafe = Override{}, true
		}
		return a, fmt.Errorf("arming state %s: %w (%v); every camera comes up armed for safety", cfg.StatePath, ErrStateUnreadable, err)
	}
	return a, nil
}

func (a *Arming) load() error {
	data, err := os.ReadFile(a.cfg.StatePath)
	if errors.Is(err, fs.ErrNotExist) {
		return nil
	}
	if err != nil {
		return err
	}
	var f armingFile
	dec := json.NewDecoder(bytes.NewReader(data))
	dec.DisallowUnknownFields()
	if err := dec.Decode(&f); err != nil {
		return err
	}
	if dec.More() {
		return errors.New("trailing data after the JSON object")
	}
	if f.V != 1 {
		return fmt.Errorf("version %d, want 1", f.V)
	}
	for id, o := range f.Overrides {
		if o.Until.IsZero() {
			return fmt.Errorf("override of camera %q has no until time", id)
		}
	}
	for id, o := range f.Overrides {
		if s, ok := a.states[id]; ok {
			s.SetOverride(o)
		}
	}
	return nil
}

// save writes every camera's override; the caller holds mu.
func (a *Arming) save() error {
	if a.cfg.StatePath == "" {
		return nil
	}
	f := armingFile{V: 1, Overrides: map[string]Override{}}
	for id, s := range a.states {
		if !s.override.Until.IsZero() {
			f.Overrides[id] = s.override
		}
	}
	data, err := json.MarshalIndent(f, "", "  ")
	if err != nil {
		return fmt.Errorf("save arming state: %w", err)
	}
	if err := writeFileAtomic(a.cfg.StatePath, append(data, '\n')); err != nil {
		return fmt.Errorf("save arming state %s: %w", a.cfg.StatePath, err)
	}
	return nil
}

// Cameras returns the camera ids, sorted.
func (a *Arming) Cameras() []string { return append([]string(nil), a.ids...) }

// Armed reports whether camera is armed at now and why. An unknown camera
// is reported armed.
func (a *Arming) Armed(camera string, now time.Time) (bool, string) {
	a.mu.Lock()
	defer a.mu.Unlock()
	s, ok := a.states[camera]
	if !ok {
		return true, fmt.Sprintf("armed: camera %q has no arming state", camera)
	}
	return a.state(s, now)
}

// state is ArmState.State with the override's author and an end-less arm
// spelled out; the caller holds mu.
func (a *Arming) state(s *ArmState, now time.Time) (bool, string) {
	o := s.override
	if !s.failSafe && o.Active(now) && o.Until.Equal(forever()) {
		return true, "armed by override until cleared" + byText(o.By)
	}
	armed, reason := s.State(now)
	if !s.failSafe && o.Active(now) {
		reason += byText(o.By)
	}
	return armed, reason
}

func byText(by string) string {
	if by == "" {
		return ""
	}
	return " (set by " + by + ")"
}

// targets resolves camera or "all" to camera ids.
func (a *Arming) targets(camera string) ([]string, error) {
	if camera == AllCameras {
		return a.ids, nil
	}
	if _, ok := a.states[camera]; !ok {
		return nil, fmt.Errorf("unknown camera %q; want %q or one of %v", camera, AllCameras, a.ids)
	}
	return []string{camera}, nil
}

// Arm arms camera (or "all") until until, overriding the schedule; a zero
// until arms it until the override is cleared. by names who asked.
func (a *Arming) Arm(camera string, until time.Time, by string, now time.Time) error {
	if until.IsZero() {
		until = forever()
	} else if !until.After(now) {
		return fmt.Errorf("arm until %s: that is not in the future", until.Format(time.RFC3339))
	}
	return a.set(camera, &Override{Armed: true, Until: until, By: by}, now)
}

// DisarmUntil disarms camera (or "all") until until, which must be in the
// future and at most MaxDisarm away.
func (a *Arming) DisarmUntil(camera string, until time.Time, by string, now time.Time) error {
	switch {
	case until.IsZero():
		return errors.New("disarm: an end time is required; a disarm always ends")
	case !until.After(now):
		return fmt.Errorf("disarm until %s: that is not in the future", until.Format(time.RFC3339))
	case until.Sub(now) > a.cfg.MaxDisarm:
		return fmt.Errorf("disarm until %s: longer than the %s allowed", until.Format(time.RFC3339), a.cfg.MaxDisarm)
	}
	return a.set(camera, &Override{Armed: false, Until: until, By: by}, now)
}

// Clear removes the override of camera (or "all") so that its schedule
// decides again; it also ends fail-safe arming.
func (a *Arming) Clear(camera, by string, now time.Time) error { return a.set(camera, nil, now) }

// set applies o (nil clears) to the cameras and saves; when saving fails
// nothing changes.
func (a *Arming) set(camera string, o *Override, now time.Time) error {
	a.mu.Lock()
	defer a.mu.Unlock()
	ids, err := a.targets(camera)
	if err != nil {
		return err
	}
	type old struct {
		o        Override
		failSafe bool
	}
	prev := map[string]old{}
	for _, id := range ids {
		s := a.states[id]
		prev[id] = old{s.override, s.failSafe}
		if o == nil {
			s.ClearOverride()
		} else {
			s.SetOverride(*o)
		}
	}
	if err := a.save(); err != nil {
		for id, p := range prev {
			a.states[id].override, a.states[id].failSafe = p.o, p.failSafe
		}
		return err
	}
	for _, id := range ids {
		a.setAt[id] = now
	}
	select {
	case a.changed <- struct{}{}:
	default:
	}
	return nil
}

// Changed is signalled after every Arm, DisarmUntil and Clear, so that the
// daemon can Poll at once instead of at its next tick.
func (a *Arming) Changed() <-chan struct{} { return a.changed }

// nextChange is when camera's state changes by itself after now; the
// caller holds mu.
func (a *Arming) nextChange(s *ArmState, now time.Time) (time.Time, bool) {
	if s.failSafe {
		return time.Time{}, false
	}
	if s.override.Active(now) {
		if s.override.Until.Equal(forever()) {
			return time.Time{}, false
		}
		return s.override.Until, true
	}
	if s.sched == nil {
		return time.Time{}, false
	}
	return s.sched.Next(now)
}

// Status returns every camera's state at now.
func (a *Arming) Status(now time.Time) ArmingStatus {
	a.mu.Lock()
	defer a.mu.Unlock()
	st := ArmingStatus{Time: now.UTC()}
	for _, id := range a.ids {
		s := a.states[id]
		armed, reason := a.state(s, now)
		row := CameraArming{Camera: id, Armed: armed, Reason: reason, FailSafe: s.failSafe}
		if o := s.override; !s.failSafe && o.Active(now) {
			row.Override = &OverrideStatus{Armed: o.Armed, By: o.By}
			if !o.Until.Equal(forever()) {
				u := o.Until.UTC()
				row.Override.Until = &u
			}
		}
		if t, ok := a.nextChange(s, now); ok {
			u := t.UTC()
			row.NextChange = &u
		}
		st.Cameras = append(st.Cameras, row)
	}
	return st
}

// Poll returns an ArmedChange for every camera whose armed state or active
// override differs from what the previous Poll reported; the first Poll
// reports every camera. A change's Time is when it took effect: the
// operator's request, the override's end or the schedule boundary, not the
// time of the Poll.
func (a *Arming) Poll(now time.Time) []ArmedChange {
	a.mu.Lock()
	defer a.mu.Unlock()
	var out []ArmedChange
	for _, id := range a.ids {
		s := a.states[id]
		armed, reason := a.state(s, now)
		var cur Override
		if s.override.Active(now) && !s.failSafe {
			cur = s.override
		}
		prev, seen := a.sent[id]
		if seen && prev.armed == armed && prev.override == cur {
			continue
		}
		at := a.changeTime(id, s, prev, now)
		c := ArmedChange{V: Version, Kind: KindArmed, Camera: id, Time: at.UTC(), Armed: armed, Reason: reason, By: cur.By}
		if !cur.Until.IsZero() && !cur.Until.Equal(forever()) {
			u := cur.Until.UTC()
			c.Until = &u
		}
		if !seen {
			c.Time = now.UTC()
		}
		out = append(out, c)
		a.sent[id] = sentState{armed: armed, override: cur}
	}
	// Request times only date changes seen by this poll; a request that
	// changed nothing must not date a later schedule change.
	clear(a.setAt)
	a.polled = now
	return out
}

// changeTime picks the latest event in (last poll, now] that explains a
// change: an operator's request, the end of the previous override or a
// schedule boundary.
func (a *Arming) changeTime(id string, s *ArmState, prev sentState, now time.Time) time.Time {
	if t, ok := a.setAt[id]; ok {
		return t
	}
	best := time.Time{}
	if u := prev.override.Until; !u.IsZero() && u.After(a.polled) && !u.After(now) {
		best = u
	}
	if s.sched != nil {
		for t, ok := s.sched.Next(a.polled); ok && !t.After(now); t, ok = s.sched.Next(t) {
			if t.After(best) {
				best = t
			}
		}
	}
	if best.IsZero() {
		return now
	}
	return best
}

// Run polls every tick and at once after each operator change, passing
// every ArmedChange to emit, until ctx ends. The first poll reports every
// camera, so subscribers learn the state at start-up. now is the clock.
func (a *Arming) Run(ctx context.Context, now func() time.Time, tick time.Duration, emit func(ArmedChange)) error {
	if tick <= 0 {
		tick = time.Second
	}
	t := time.NewTicker(tick)
	defer t.Stop()
	for {
		for _, c := range a.Poll(now()) {
			emit(c)
		}
		select {
		case <-ctx.Done():
			return nil
		case <-t.C:
		case <-a.changed:
		}
	}
}

// SetSchedules replaces the schedules, as a configuration reload does,
// keeping every override and fail-safe state. def and per have the same
// meaning as ArmingConfig.Default and Schedules. A change the new
// schedules cause is dated now by the next Poll.
func (a *Arming) SetSchedules(def *Schedule, per map[string]*Schedule, now time.Time) error {
	a.mu.Lock()
	defer a.mu.Unlock()
	for id := range per {
		if _, ok := a.states[id]; !ok {
			return fmt.Errorf("arming: schedule for unknown camera %q", id)
		}
	}
	a.cfg.Default, a.cfg.Schedules = def, per
	for id, s := range a.states {
		sched := def
		if p, ok := per[id]; ok && p != nil {
			sched = p
		}
		s.sched = sched
		a.setAt[id] = now
	}
	select {
	case a.changed <- struct{}{}:
	default:
	}
	return nil
}
