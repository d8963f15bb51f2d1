package main

import (
	"fmt"
	"sync"
	"time"

	"stillwater/alert"
)

// armBoard answers whether each camera is armed now, from its schedule.
type armBoard struct {
	mu     sync.Mutex
	states map[string]*alert.ArmState
}

func newArmBoard(cfg Config) (*armBoard, error) {
	sch, err := cfg.schedules()
	if err != nil {
		return nil, fmt.Errorf("arming: %w", err)
	}
	b := &armBoard{states: map[string]*alert.ArmState{}}
	for id, s := range sch {
		b.states[id] = alert.NewArmState(s)
	}
	return b, nil
}

// armed reports whether camera is armed at t; an unknown camera is armed.
func (b *armBoard) armed(camera string, t time.Time) bool {
	b.mu.Lock()
	defer b.mu.Unlock()
	s, ok := b.states[camera]
	if !ok {
		return true
	}
	a, _ := s.State(t)
	return a
}

// setSchedules replaces the schedules, keeping any override.
func (b *armBoard) setSchedules(sch map[string]*alert.Schedule) {
	b.mu.Lock()
	defer b.mu.Unlock()
	for id, s := range sch {
		st := alert.NewArmState(s)
		if old, ok := b.states[id]; ok {
			st.SetOverride(old.Override())
		}
		b.states[id] = st
	}
}
