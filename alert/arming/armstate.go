package arming

import (
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
	"io/fs"
	"os"
	"path/filepath"
	"time"
)

// ArmState combines a schedule with an operator's override. The override
// wins while it is active and lapses by itself at its Until instant, after
// which the schedule decides again. Not safe for concurrent use.
type ArmState struct {
	sched    *Schedule
	override Override
	// failSafe is set when the saved override could not be read: the state
	// stays armed until an operator sets or clears an override.
	failSafe bool
}

// NewArmState returns a state driven by sched. A nil schedule means armed
// around the clock.
func NewArmState(sched *Schedule) *ArmState { return &ArmState{sched: sched} }

// SetOverride replaces any override (and ends fail-safe arming).
func (a *ArmState) SetOverride(o Override) { a.override, a.failSafe = o, false }

// ClearOverride removes any override (and ends fail-safe arming).
func (a *ArmState) ClearOverride() { a.override, a.failSafe = Override{}, false }

// Override returns the current override, which may have expired.
func (a *ArmState) Override() Override { return a.override }

// State reports whether the alarm is armed at now and a human reason.
// Times in reasons are in the schedule's zone (UTC without a schedule).
func (a *ArmState) State(now time.Time) (armed bool, reason string) {
	loc := time.UTC
	if a.sched != nil {
		loc = a.sched.loc
	}
	switch {
	case a.failSafe:
		return true, "armed: override state file was unreadable, armed for safety until an operator sets the state"
	case a.override.Active(now):
		verb := "disarmed"
		if a.override.Armed {
			verb = "armed"
		}
		return a.override.Armed, fmt.Sprintf("%s by override until %s", verb, a.override.Until.In(loc).Format(time.RFC3339))
	case a.sched == nil:
		return true, "armed: no schedule"
	}
	if i, ok := a.sched.armedBy(now); ok {
		return true, fmt.Sprintf("armed by schedule window %d %q", i, a.sched.windows[i].text)
	}
	return false, "disarmed: outside every schedule window"
}

// overrideFile is the on-disk form; a null override means none.
type overrideFile struct {
	V        int       `json:"v"`
	Override *Override `json:"override"`
}

// SaveOverride writes the current override to path as JSON. It writes a
// temporary file in the same directory and renames it over path, so that a
// crash leaves either the old or the new state, never a torn file.
func (a *ArmState) SaveOverride(path string) error {
	f := overrideFile{V: 1}
	if !a.override.Until.IsZero() {
		o := a.override
		f.Override = &o
	}
	data, err := json.MarshalIndent(f, "", "  ")
	if err != nil {
		return fmt.Errorf("save override %s: %w", path, err)
	}
	if err := writeFileAtomic(path, append(data, '\n')); err != nil {
		return fmt.Errorf("save override %s: %w", path, err)
	}
	return nil
}

// writeFileAtomic writes a temporary file in the same directory and
// renames it over path, so that a crash leaves either the old or the new
// content, never a torn file; then it syncs the directory so the rename
// itself survives a power cut.
func writeFileAtomic(path string, data []byte) error {
	dir := filepath.Dir(path)
	tmp, err := os.CreateTemp(dir, "."+filepath.Base(path)+".*.tmp")
	if err != nil {
		return err
	}
	defer os.Remove(tmp.Name()) // no-op after a successful rename
	if _, err := tmp.Write(data); err != nil {
		tmp.Close()
		return fmt.Errorf("write temp file: %w", err)
	}
	if err := tmp.Sync(); err != nil {
		tmp.Close()
		return fmt.Errorf("sync temp file: %w", err)
	}
	if err := tmp.Close(); err != nil {
		return fmt.Errorf("close temp file: %w", err)
	}
	if err := os.Rename(tmp.Name(), path); err != nil {
		return err
	}
	if err := syncDir(dir); err != nil {
		return fmt.Errorf("sync directory: %w", err)
	}
	return nil
}

// syncDir flushes a directory's entries, so that a rename in it survives
// a power cut.
func syncDir(dir string) error {
	d, err := os.Open(dir)
	if err != nil {
		return err
	}
	defer d.Close()
	return d.Sync()
}

// LoadOverride reads an override saved by SaveOverride and returns whether
// the alarm is armed at now. A missing file is no override. A file that
// exists but cannot be read or parsed puts the state in fail-safe arming
// and returns armed=true with an error wrapping ErrStateUnreadable; the
// caller should log it and run armed.
func (a *ArmState) LoadOverride(path string, now time.Time) (armed bool, err error) {
	data, err := os.ReadFile(path)
	if errors.Is(err, fs.ErrNotExist) {
		a.override, a.failSafe = Override{}, false
		armed, _ = a.State(now)
		return armed, nil
	}
	if err == nil {
		var f overrideFile
		dec := json.NewDecoder(bytes.NewReader(data))
		dec.DisallowUnknownFields()
		switch err = dec.Decode(&f); {
		case err != nil:
		case dec.More():
			err = errors.New("trailing data after the JSON object")
		case f.V != 1:
			err = fmt.Errorf("version %d, want 1", f.V)
		case f.Override != nil && f.Override.Until.IsZero():
			err = errors.New("override without an until time")
		default:
			a.override, a.failSafe = Override{}, false
			if f.Override != nil {
				a.override = *f.Override
			}
			armed, _ = a.State(now)
			return armed, nil
		}
	}
	a.override, a.failSafe = Override{}, true
	return true, fmt.Errorf("load override %s: %w (%v); coming up armed for safety", path, ErrStateUnreadable, err)
}
