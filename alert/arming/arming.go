package arming

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"io/fs"
	"log/slog"
	"os"
	"sort"
	"strings"
	"sync"
	"time"
	"unicode"
	"unicode/utf8"

	"stillwater/alert"
)

// forever is the Until of an override set without an end.
func forever() time.Time { return time.Date(9999, 12, 31, 0, 0, 0, 0, time.UTC) }

// Config sets up per-camera arming.
type Config struct {
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
	// always ends, so a forgotten one cannot leave the pool unwatched. A
	// saved disarm that ends later than MaxDisarm after New's now is
	// cut to that bound.
	MaxDisarm time.Duration
	// Log receives a line for every saved record that is clamped, dropped
	// or found invalid, naming the state file; nil discards them.
	Log *slog.Logger
}

// Arming holds one ArmState per camera and the overrides operators set.
// Safe for concurrent use.
type Arming struct {
	cfg     Config
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

// CameraStatus is one camera's row of a status snapshot.
type CameraStatus struct {
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

// Status is a snapshot of every camera at Time (UTC).
type Status struct {
	Time    time.Time      `json:"time"`
	Cameras []CameraStatus `json:"cameras"`
}

// armingFile is the state file's form. FailSafe lists the cameras armed
// for safety because their saved state was unusable, so that a restart
// does not quietly hand them back to the schedule.
type armingFile struct {
	V         int                 `json:"v"`
	Overrides map[string]Override `json:"overrides"`
	FailSafe  []string            `json:"fail_safe,omitempty"`
}

// maxByLen bounds the author of a saved override: "http:" or "nats:"
// and a name of at most 64 characters fit with room to spare.
const maxByLen = 128

// New builds the per-camera states and loads saved overrides from
// cfg.StatePath. A missing file is no override. A file that cannot be read
// or parsed leaves every camera armed in fail-safe (its reason says so)
// until an operator sets or clears its state: New then returns the
// usable *Arming together with an error wrapping ErrStateUnreadable, which
// the caller should log loudly and go on.
func New(cfg Config, now time.Time) (*Arming, error) {
	if len(cfg.Cameras) == 0 {
		return nil, errors.New("arming: no cameras")
	}
	if cfg.MaxDisarm <= 0 {
		cfg.MaxDisarm = 24 * time.Hour
	}
	if cfg.Log == nil {
		cfg.Log = slog.New(slog.NewTextHandler(io.Discard, nil))
	}
	a := &Arming{cfg: cfg, states: map[string]*ArmState{}, sent: map[string]sentState{}, setAt: map[string]time.Time{}, changed: make(chan struct{}, 1)}
	for _, id := range cfg.Cameras {
		if err := alert.ValidToken(id); err != nil {
			return nil, fmt.Errorf("arming: camera %q: %v", id, err)
		}
		if err := alert.ReservedCamera(id); err != nil {
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
	return a, a.load(now)
}

// load reads the state file. Each record is checked on its own: a good
// one is applied (a disarm cut to MaxDisarm), a camera whose record is bad
// is armed for safety, and a record for a camera not configured is
// dropped. A file that cannot be parsed at all arms every camera for
// safety and returns an error wrapping ErrStateUnreadable. Whenever
// anything was changed or rejected, the file as found is kept aside as
// PATH.rejected-TIME and the cleaned state is written in its place.
func (a *Arming) load(now time.Time) error {
	path, log := a.cfg.StatePath, a.cfg.Log
	data, err := os.ReadFile(path)
	if errors.Is(err, fs.ErrNotExist) {
		return nil
	}
	if err != nil {
		a.failAll()
		return fmt.Errorf("arming state %s: %w (%v); every camera comes up armed for safety", path, ErrStateUnreadable, err)
	}
	f, err := decodeArmingFile(data)
	if err != nil {
		a.failAll()
		aside, aerr := a.setAside(data, now)
		where := "the file is kept as " + aside
		switch {
		case aerr != nil:
			where = fmt.Sprintf("the file stays in place (%v)", aerr)
		case a.save() != nil:
			where += "; the fail-safe state could not be written, so the next start reads the file as found again"
		}
		return fmt.Errorf("arming state %s: %w (%v); every camera comes up armed for safety; %s", path, ErrStateUnreadable, err, where)
	}
	type note struct {
		camera, problem string
		clamped         bool
		saved, until    time.Time
	}
	var notes []note
	ids := make([]string, 0, len(f.Overrides))
	for id := range f.Overrides {
		ids = append(ids, id)
	}
	sort.Strings(ids)
	for _, id := range ids {
		s, known := a.states[id]
		if !known {
			notes = append(notes, note{camera: id, problem: "no such camera in the configuration; override dropped"})
			continue
		}
		o, err := decodeOverride(f.Overrides[id])
		if err != nil {
			s.override, s.failSafe = Override{}, true
			notes = append(notes, note{camera: id, problem: err.Error() + "; camera armed for safety until an operator sets its state"})
			continue
		}
		if limit := now.Add(a.cfg.MaxDisarm); !o.Armed && o.Until.After(limit) {
			notes = append(notes, note{camera: id, clamped: true, saved: o.Until, until: limit})
			o.Until = limit
		}
		s.SetOverride(o)
	}
	for _, id := range f.FailSafe {
		if s, ok := a.states[id]; ok {
			s.failSafe = true
		} else {
			notes = append(notes, note{camera: id, problem: "fail-safe mark for a camera not in the configuration; dropped"})
		}
	}
	if len(notes) == 0 {
		return nil
	}
	aside, aerr := a.setAside(data, now)
	if aerr != nil {
		log.Error("arming state: cannot keep the file as found; leaving it in place", "file", path, "err", aerr)
	}
	for _, n := range notes {
		if n.clamped {
			log.Warn("arming state: saved disarm ends later than max_disarm allows; cut short",
				"file", path, "camera", n.camera, "saved_until", n.saved.UTC().Format(time.RFC3339),
				"until", n.until.UTC().Format(time.RFC3339), "max_disarm", a.cfg.MaxDisarm.String(), "kept_as", aside)
			continue
		}
		log.Error("arming state: record set aside", "file", path, "camera", n.camera, "problem", n.problem, "kept_as", aside)
	}
	if aerr != nil {
		return nil
	}
	if err := a.save(); err != nil {
		log.Error("arming state: cannot write the cleaned state; the next start reads the file as found again", "file", path, "err", err)
	}
	return nil
}

// failAll arms every camera for safety.
func (a *Arming) failAll() {
	for _, s := range a.states {
		s.override, s.failSafe = Override{}, true
	}
}

// decodeArmingFile parses the file's frame: the version and the records,
// each left raw to be checked on its own.
func decodeArmingFile(data []byte) (rawArmingFile, error) {
	var f rawArmingFile
	dec := json.NewDecoder(bytes.NewReader(data))
	dec.DisallowUnknownFields()
	if err := dec.Decode(&f); err != nil {
		return f, err
	}
	if _, err := dec.Token(); !errors.Is(err, io.EOF) {
		return f, errors.New("trailing data after the JSON object")
	}
	if f.V != 1 {
		return f, fmt.Errorf("version %d, want 1", f.V)
	}
	return f, nil
}

// rawArmingFile is armingFile with its records undecoded.
type rawArmingFile struct {
	V         int                        `json:"v"`
	Overrides map[string]json.RawMessage `json:"overrides"`
	FailSafe  []string                   `json:"fail_safe"`
}

// decodeOverride parses and checks one saved record.
func decodeOverride(raw json.RawMessage) (Override, error) {
	var o Override
	dec := json.NewDecoder(bytes.NewReader(raw))
	dec.DisallowUnknownFields()
	if err := dec.Decode(&o); err != nil {
		return Override{}, fmt.Errorf("not an override record: %v", err)
	}
	switch {
	case o.Until.IsZero():
		return Override{}, errors.New("override has no until time")
	case len(o.By) > maxByLen || !utf8.ValidString(o.By) || strings.IndexFunc(o.By, func(r rune) bool { return !unicode.IsPrint(r) }) >= 0:
		return Override{}, fmt.Errorf("by is not %d or fewer printable characters", maxByLen)
	}
	return o, nil
}

// setAside keeps data, the state file as found, next to it as
// PATH.rejected-TIME and returns that name.
func (a *Arming) setAside(data []byte, now time.Time) (string, error) {
	base := a.cfg.StatePath + ".rejected-" + now.UTC().Format("20060102T150405Z")
	for i := 1; i < 100; i++ {
		name := base
		if i > 1 {
			name = fmt.Sprintf("%s-%d", base, i)
		}
		f, err := os.OpenFile(name, os.O_WRONLY|os.O_CREATE|os.O_EXCL, 0o600)
		if errors.Is(err, fs.ErrExist) {
			continue
		}
		if err != nil {
			return "", err
		}
		_, werr := f.Write(data)
		serr := f.Sync()
		if cerr := f.Close(); werr == nil && serr == nil {
			werr = cerr
		}
		if werr == nil {
			werr = serr
		}
		if werr != nil {
			os.Remove(name)
			return "", werr
		}
		return name, nil
	}
	return "", fmt.Errorf("too many files named %s*", base)
}

// save writes every camera's override; the caller holds mu.
func (a *Arming) save() error {
	if a.cfg.StatePath == "" {
		return nil
	}
	f := armingFile{V: 1, Overrides: map[string]Override{}}
	for _, id := range a.ids {
		s := a.states[id]
		if !s.override.Until.IsZero() {
			f.Overrides[id] = s.override
		}
		if s.failSafe {
			f.FailSafe = append(f.FailSafe, id)
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
	if !s.failSafe && o.Armed && o.Active(now) && o.Until.Equal(forever()) {
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
	if camera == alert.AllCameras {
		return a.ids, nil
	}
	if _, ok := a.states[camera]; !ok {
		return nil, fmt.Errorf("unknown camera %q; want %q or one of %v", camera, alert.AllCameras, a.ids)
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
		if s.override.Armed && s.override.Until.Equal(forever()) {
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
func (a *Arming) Status(now time.Time) Status {
	a.mu.Lock()
	defer a.mu.Unlock()
	st := Status{Time: now.UTC()}
	for _, id := range a.ids {
		s := a.states[id]
		armed, reason := a.state(s, now)
		row := CameraStatus{Camera: id, Armed: armed, Reason: reason, FailSafe: s.failSafe}
		if o := s.override; !s.failSafe && o.Active(now) {
			row.Override = &OverrideStatus{Armed: o.Armed, By: o.By}
			if !o.Armed || !o.Until.Equal(forever()) {
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
func (a *Arming) Poll(now time.Time) []alert.ArmedChange {
	a.mu.Lock()
	defer a.mu.Unlock()
	var out []alert.ArmedChange
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
		c := alert.ArmedChange{V: alert.Version, Kind: alert.KindArmed, Camera: id, Time: at.UTC(), Armed: armed, Reason: reason, By: cur.By}
		if !cur.Until.IsZero() && (!cur.Armed || !cur.Until.Equal(forever())) {
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
func (a *Arming) Run(ctx context.Context, now func() time.Time, tick time.Duration, emit func(alert.ArmedChange)) error {
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
// meaning as Config.Default and Schedules. A change the new
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

// SetMaxDisarm changes the longest disarm, as a configuration reload
// does; d <= 0 is the 24 h default. Disarms already running that would
// now end later than now+d are cut to that instant and saved; the
// cameras cut are returned. When saving fails nothing changes.
func (a *Arming) SetMaxDisarm(d time.Duration, now time.Time) ([]string, error) {
	if d <= 0 {
		d = 24 * time.Hour
	}
	a.mu.Lock()
	defer a.mu.Unlock()
	prevMax := a.cfg.MaxDisarm
	prev := map[string]Override{}
	limit := now.Add(d)
	var cut []string
	for _, id := range a.ids {
		s := a.states[id]
		if o := s.override; !s.failSafe && !o.Armed && o.Active(now) && o.Until.After(limit) {
			prev[id] = o
			s.override.Until = limit
			cut = append(cut, id)
		}
	}
	a.cfg.MaxDisarm = d
	if len(cut) == 0 {
		return nil, nil
	}
	if err := a.save(); err != nil {
		for id, o := range prev {
			a.states[id].override = o
		}
		a.cfg.MaxDisarm = prevMax
		return nil, err
	}
	for _, id := range cut {
		a.setAt[id] = now
	}
	select {
	case a.changed <- struct{}{}:
	default:
	}
	return cut, nil
}
