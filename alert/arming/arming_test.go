package arming

import (
	"bytes"
	"context"
	"log/slog"
	"os"
	"path/filepath"
	"sync"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"stillwater/alert"
)

func mustSchedule(t testing.TB, zone string, windows ...string) *Schedule {
	t.Helper()
	s, err := ParseSchedule(zone, windows)
	require.NoError(t, err)
	return s
}

// pollEvery polls a from..to in steps and returns the changes after the
// first poll, validating each against the armed schema.
func pollEvery(t *testing.T, a *Arming, from, to time.Time, step time.Duration) []alert.ArmedChange {
	t.Helper()
	a.Poll(from)
	var out []alert.ArmedChange
	for now := from.Add(step); !now.After(to); now = now.Add(step) {
		for _, c := range a.Poll(now) {
			validateMessage(t, alert.KindArmed, c)
			out = append(out, c)
		}
	}
	return out
}

type edge struct {
	camera string
	at     time.Time
	armed  bool
}

func edges(cs []alert.ArmedChange) []edge {
	var out []edge
	for _, c := range cs {
		out = append(out, edge{c.Camera, c.Time, c.Armed})
	}
	return out
}

// The change instants follow the DST rules quoted in
// TestDSTDatesFromTzdata (EU: last Sunday of March/October at 01:00 UTC;
// US: second Sunday of March, first Sunday of November at 02:00 local).
func TestArmingScheduleEdgesAcrossDST(t *testing.T) {
	cases := []struct {
		name     string
		zone     string
		windows  []string
		from, to time.Time
		want     []edge
	}{
		{
			// 22:00 CET is 21:00 UTC; 06:00 CEST after the change is 04:00
			// UTC: seven hours of arming, not eight.
			name: "berlin spring night", zone: "Europe/Berlin", windows: []string{"daily 22:00-06:00"},
			from: utc(2026, 3, 28, 20, 0), to: utc(2026, 3, 29, 6, 0),
			want: []edge{{"north", utc(2026, 3, 28, 21, 0), true}, {"north", utc(2026, 3, 29, 4, 0), false}},
		},
		{
			// 22:00 CEST is 20:00 UTC; 06:00 CET is 05:00 UTC: nine hours.
			name: "berlin autumn night", zone: "Europe/Berlin", windows: []string{"daily 22:00-06:00"},
			from: utc(2026, 10, 24, 19, 0), to: utc(2026, 10, 25, 6, 0),
			want: []edge{{"north", utc(2026, 10, 24, 20, 0), true}, {"north", utc(2026, 10, 25, 5, 0), false}},
		},
		{
			// 01:30 EST is 06:30 UTC; the clock jumps 02:00→03:00 and
			// 03:00 EDT is 07:00 UTC: half an hour.
			name: "new york spring", zone: "America/New_York", windows: []string{"sun 01:30-03:00"},
			from: utc(2026, 3, 8, 5, 0), to: utc(2026, 3, 8, 9, 0),
			want: []edge{{"north", utc(2026, 3, 8, 6, 30), true}, {"north", utc(2026, 3, 8, 7, 0), false}},
		},
		{
			// 01:30 happens twice; the first (EDT, 05:30 UTC) starts it and
			// 03:00 EST (08:00 UTC) ends it: two and a half hours.
			name: "new york autumn", zone: "America/New_York", windows: []string{"sun 01:30-03:00"},
			from: utc(2026, 11, 1, 4, 0), to: utc(2026, 11, 1, 9, 0),
			want: []edge{{"north", utc(2026, 11, 1, 5, 30), true}, {"north", utc(2026, 11, 1, 8, 0), false}},
		},
		{
			// A weekday window crossing midnight belongs to the day it
			// starts on: Friday's runs into Saturday morning and no window
			// starts on Saturday. CET is UTC+1 in December.
			name: "across midnight into the weekend", zone: "Europe/Berlin", windows: []string{"mon-fri 18:00-08:00"},
			from: utc(2026, 12, 4, 12, 0), to: utc(2026, 12, 6, 12, 0),
			want: []edge{{"north", utc(2026, 12, 4, 17, 0), true}, {"north", utc(2026, 12, 5, 7, 0), false}},
		},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			a, err := New(Config{Cameras: []string{"north", "south"},
				Schedules: map[string]*Schedule{"north": mustSchedule(t, c.zone, c.windows...)}}, c.from)
			require.NoError(t, err)
			// Polling every 7 minutes still dates each change exactly.
			got := pollEvery(t, a, c.from, c.to, 7*time.Minute)
			assert.Equal(t, c.want, edges(got), "south has no schedule and stays armed without a change")
		})
	}
}

func TestArmingFirstPollReportsEveryCamera(t *testing.T) {
	now := utc(2026, 12, 2, 12, 0)
	a, err := New(Config{Cameras: []string{"south", "north"}, Default: mustSchedule(t, "UTC", "daily 20:00-06:00")}, now)
	require.NoError(t, err)
	cs := a.Poll(now)
	require.Len(t, cs, 2)
	assert.Equal(t, "north", cs[0].Camera)
	assert.False(t, cs[0].Armed)
	assert.Contains(t, cs[0].Reason, "outside every schedule window")
	assert.Empty(t, a.Poll(now.Add(time.Second)), "no change, nothing to report")
}

func TestArmingOverrideExpires(t *testing.T) {
	t0 := utc(2026, 12, 2, 12, 0) // outside the 20:00-06:00 window
	a, err := New(Config{Cameras: []string{"north", "south"}, Default: mustSchedule(t, "UTC", "daily 20:00-06:00")}, t0)
	require.NoError(t, err)
	a.Poll(t0)

	setAt := t0.Add(10 * time.Minute)
	until := utc(2026, 12, 2, 15, 0)
	require.NoError(t, a.Arm(alert.AllCameras, until, "http:alice", setAt))
	select {
	case <-a.Changed():
	default:
		t.Fatal("Changed not signalled")
	}
	cs := a.Poll(setAt.Add(300 * time.Millisecond))
	require.Len(t, cs, 2)
	for _, c := range cs {
		validateMessage(t, alert.KindArmed, c)
		assert.True(t, c.Armed)
		assert.Equal(t, setAt, c.Time, "dated by the request")
		require.NotNil(t, c.Until)
		assert.Equal(t, until, *c.Until)
		assert.Equal(t, "http:alice", c.By)
		assert.Contains(t, c.Reason, "set by http:alice")
	}
	cs = pollEvery(t, a, setAt.Add(time.Second), utc(2026, 12, 2, 21, 0), time.Minute)
	assert.Equal(t, []edge{
		{"north", until, false}, {"south", until, false}, // override lapses exactly at until
		{"north", utc(2026, 12, 2, 20, 0), true}, {"south", utc(2026, 12, 2, 20, 0), true},
	}, edges(cs))

	// Disarm one camera inside the armed window; it re-arms at the end.
	t1 := utc(2026, 12, 2, 22, 0)
	require.NoError(t, a.DisarmUntil("north", t1.Add(30*time.Minute), "nats:bob", t1))
	armed, reason := a.Armed("north", t1.Add(time.Minute))
	assert.False(t, armed)
	assert.Contains(t, reason, "disarmed by override until 2026-12-02T22:30:00Z (set by nats:bob)")
	armed, _ = a.Armed("south", t1.Add(time.Minute))
	assert.True(t, armed, "the other camera keeps its state")
	cs = pollEvery(t, a, t1, t1.Add(time.Hour), time.Minute)
	assert.Equal(t, []edge{{"north", t1.Add(30 * time.Minute), true}}, edges(cs))

	st := a.Status(t1.Add(10 * time.Minute))
	require.Len(t, st.Cameras, 2)
	require.NotNil(t, st.Cameras[0].Override)
	assert.Equal(t, "nats:bob", st.Cameras[0].Override.By)
	require.NotNil(t, st.Cameras[0].NextChange)
	assert.Equal(t, t1.Add(30*time.Minute), *st.Cameras[0].NextChange)
	require.NotNil(t, st.Cameras[1].NextChange)
	assert.Equal(t, utc(2026, 12, 3, 6, 0), *st.Cameras[1].NextChange)
}

func TestArmingRefusesBadRequests(t *testing.T) {
	now := utc(2026, 12, 2, 22, 0)
	a, err := New(Config{Cameras: []string{"north"}, MaxDisarm: 12 * time.Hour}, now)
	require.NoError(t, err)
	cases := []struct {
		name string
		do   func() error
		want string
	}{
		{"disarm without end", func() error { return a.DisarmUntil("north", time.Time{}, "x", now) }, "always ends"},
		{"disarm in the past", func() error { return a.DisarmUntil("north", now.Add(-time.Minute), "x", now) }, "not in the future"},
		{"disarm too long", func() error { return a.DisarmUntil("north", now.Add(13*time.Hour), "x", now) }, "longer than the 12h0m0s allowed"},
		{"unknown camera", func() error { return a.DisarmUntil("south", now.Add(time.Hour), "x", now) }, `unknown camera "south"`},
		{"arm in the past", func() error { return a.Arm("north", now.Add(-time.Hour), "x", now) }, "not in the future"},
	}
	for _, c := range cases {
		err := c.do()
		require.Error(t, err, c.name)
		assert.Contains(t, err.Error(), c.want, c.name)
		armed, _ := a.Armed("north", now)
		assert.True(t, armed, "%s: state unchanged", c.name)
	}
	_, err = New(Config{Cameras: []string{"all"}}, now)
	assert.ErrorContains(t, err, "reserved")
	_, err = New(Config{Cameras: []string{"north"}, Schedules: map[string]*Schedule{"south": nil}}, now)
	assert.ErrorContains(t, err, `unknown camera "south"`)
}

func TestArmingArmWithoutEnd(t *testing.T) {
	now := utc(2026, 12, 2, 12, 0)
	a, err := New(Config{Cameras: []string{"north"}, Default: mustSchedule(t, "UTC", "daily 20:00-06:00")}, now)
	require.NoError(t, err)
	require.NoError(t, a.Arm("north", time.Time{}, "http", now))
	armed, reason := a.Armed("north", now.Add(48*time.Hour))
	assert.True(t, armed)
	assert.Equal(t, "armed by override until cleared (set by http)", reason)
	cs := a.Poll(now)
	require.Len(t, cs, 1)
	assert.Nil(t, cs[0].Until)
	validateMessage(t, alert.KindArmed, cs[0])
	require.NoError(t, a.Clear("north", "http", now.Add(time.Hour)))
	armed, _ = a.Armed("north", now.Add(time.Hour))
	assert.False(t, armed, "cleared: the schedule decides again")
}

func TestArmingPersistsAcrossRestart(t *testing.T) {
	dir := t.TempDir()
	path := filepath.Join(dir, "arming.json")
	now := utc(2026, 12, 2, 22, 0)
	cfg := Config{Cameras: []string{"north", "south"}, StatePath: path}
	a, err := New(cfg, now)
	require.NoError(t, err)
	require.NoError(t, a.DisarmUntil("north", now.Add(2*time.Hour), "http:alice", now))

	b, err := New(cfg, now.Add(time.Minute))
	require.NoError(t, err)
	armed, reason := b.Armed("north", now.Add(time.Minute))
	assert.False(t, armed, "the disarm survived the restart")
	assert.Contains(t, reason, "set by http:alice")
	armed, _ = b.Armed("north", now.Add(2*time.Hour))
	assert.True(t, armed, "and still lapses on time")
	armed, _ = b.Armed("south", now)
	assert.True(t, armed)

	// A save that fails changes nothing.
	bad, err := New(Config{Cameras: []string{"north"}, StatePath: filepath.Join(dir, "missing", "arming.json")}, now)
	require.NoError(t, err)
	require.Error(t, bad.DisarmUntil("north", now.Add(time.Hour), "x", now))
	armed, _ = bad.Armed("north", now)
	assert.True(t, armed, "not disarmed when the state could not be saved")
}

func TestArmingUnreadableStateFailsArmed(t *testing.T) {
	now := utc(2026, 12, 2, 22, 0)
	for name, content := range map[string]string{
		"garbage":       "{not json",
		"wrong version": `{"v":7,"overrides":{}}`,
		"unknown field": `{"v":1,"overrides":{},"extra":1}`,
	} {
		t.Run(name, func(t *testing.T) {
			path := filepath.Join(t.TempDir(), "arming.json")
			require.NoError(t, os.WriteFile(path, []byte(content), 0o600))
			a, err := New(Config{Cameras: []string{"north"}, StatePath: path, Default: mustSchedule(t, "UTC", "daily 06:00-07:00")}, now)
			require.ErrorIs(t, err, ErrStateUnreadable)
			assert.Contains(t, err.Error(), path)
			require.NotNil(t, a)
			armed, reason := a.Armed("north", now)
			assert.True(t, armed, "outside the window, yet armed for safety")
			assert.Contains(t, reason, "unreadable")
			assert.True(t, a.Status(now).Cameras[0].FailSafe)
			cs := a.Poll(now)
			require.Len(t, cs, 1)
			assert.True(t, cs[0].Armed)
			validateMessage(t, alert.KindArmed, cs[0])

			// An operator's clear ends fail-safe and writes a good file.
			require.NoError(t, a.Clear(alert.AllCameras, "http", now))
			armed, _ = a.Armed("north", now)
			assert.False(t, armed)
			_, err = New(Config{Cameras: []string{"north"}, StatePath: path}, now)
			assert.NoError(t, err)
		})
	}
}

func TestArmingConcurrentUse(t *testing.T) {
	now := utc(2026, 12, 2, 22, 0)
	a, err := New(Config{Cameras: []string{"north", "south"}, StatePath: filepath.Join(t.TempDir(), "a.json")}, now)
	require.NoError(t, err)
	var wg sync.WaitGroup
	for i := 0; i < 4; i++ {
		wg.Add(1)
		go func(i int) {
			defer wg.Done()
			for j := 0; j < 50; j++ {
				at := now.Add(time.Duration(j) * time.Second)
				if i%2 == 0 {
					assert.NoError(t, a.DisarmUntil(alert.AllCameras, at.Add(time.Hour), "t", at))
				} else {
					a.Armed("north", at)
					a.Status(at)
					a.Poll(at)
				}
			}
		}(i)
	}
	wg.Wait()
	armed, _ := a.Armed("south", now.Add(time.Minute))
	assert.False(t, armed)
}

// TestArmingRunEmitsChanges drives Run with a fake clock and an hourly
// tick: the start-up state and an operator's disarm both reach emit, the
// disarm at once rather than at the next tick.
func TestArmingRunEmitsChanges(t *testing.T) {
	var mu sync.Mutex
	clock := utc(2026, 12, 2, 12, 0)
	now := func() time.Time { mu.Lock(); defer mu.Unlock(); return clock }
	a, err := New(Config{Cameras: []string{"north"}}, now())
	require.NoError(t, err)
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	emitted := make(chan alert.ArmedChange, 4)
	done := make(chan error, 1)
	go func() { done <- a.Run(ctx, now, time.Hour, func(c alert.ArmedChange) { emitted <- c }) }()
	next := func() alert.ArmedChange {
		t.Helper()
		select {
		case c := <-emitted:
			validateMessage(t, alert.KindArmed, c)
			return c
		case <-time.After(5 * time.Second):
			t.Fatal("no armed change emitted")
			return alert.ArmedChange{}
		}
	}
	first := next()
	assert.Equal(t, "north", first.Camera)
	assert.True(t, first.Armed)

	require.NoError(t, a.DisarmUntil("north", now().Add(time.Hour), "http:alice", now()))
	second := next() // long before the hourly tick
	assert.False(t, second.Armed)
	assert.Equal(t, "http:alice", second.By)
	cancel()
	require.NoError(t, <-done)
	assert.Empty(t, emitted, "nothing else was emitted")
}

func TestArmingNoOpRequestDoesNotDateLaterChange(t *testing.T) {
	t0 := utc(2026, 12, 2, 19, 0)
	a, err := New(Config{Cameras: []string{"north"}, Default: mustSchedule(t, "UTC", "daily 20:00-06:00")}, t0)
	require.NoError(t, err)
	a.Poll(t0)
	require.NoError(t, a.Clear("north", "http", t0.Add(time.Minute))) // nothing to clear
	assert.Empty(t, a.Poll(t0.Add(2*time.Minute)))
	cs := a.Poll(utc(2026, 12, 2, 20, 30))
	require.Len(t, cs, 1)
	assert.Equal(t, utc(2026, 12, 2, 20, 0), cs[0].Time, "dated by the schedule, not by the earlier clear")
}

func TestArmingSetSchedulesKeepsOverrides(t *testing.T) {
	now := utc(2026, 12, 2, 12, 0)
	a, err := New(Config{Cameras: []string{"north", "south"}}, now)
	require.NoError(t, err)
	a.Poll(now)
	require.NoError(t, a.DisarmUntil("north", now.Add(time.Hour), "http", now))
	a.Poll(now)
	reload := now.Add(time.Minute)
	require.NoError(t, a.SetSchedules(mustSchedule(t, "UTC", "daily 20:00-06:00"), nil, reload))
	cs := a.Poll(reload.Add(time.Second))
	assert.Equal(t, []edge{{"south", reload, false}}, edges(cs), "south follows the new schedule; north keeps its disarm")
	armed, reason := a.Armed("north", reload)
	assert.False(t, armed)
	assert.Contains(t, reason, "override")
	assert.Error(t, a.SetSchedules(nil, map[string]*Schedule{"east": nil}, reload))
}

// logTo returns a text logger writing to b.
func logTo(b *bytes.Buffer) *slog.Logger { return slog.New(slog.NewTextHandler(b, nil)) }

// asideFiles lists what New moved aside next to path.
func asideFiles(t *testing.T, path string) []string {
	t.Helper()
	m, err := filepath.Glob(path + ".rejected-*")
	require.NoError(t, err)
	return m
}

// A disarm saved before a crash, edited by hand or written by an older
// version may end long after max_disarm allows. It must not outlive the
// bound: it is clamped on load, logged, and the original kept aside.
func TestArmingClampsSavedDisarm(t *testing.T) {
	now := utc(2026, 12, 2, 22, 0)
	path := filepath.Join(t.TempDir(), "arming.json")
	orig := `{"v":1,"overrides":{"north":{"armed":false,"until":"9999-12-30T00:00:00Z","by":"http:x"}}}`
	require.NoError(t, os.WriteFile(path, []byte(orig), 0o600))
	var logs bytes.Buffer
	a, err := New(Config{Cameras: []string{"north"}, StatePath: path, MaxDisarm: 24 * time.Hour, Log: logTo(&logs)}, now)
	require.NoError(t, err)

	armed, reason := a.Armed("north", now.Add(23*time.Hour))
	assert.False(t, armed, "still disarmed inside the bound: %s", reason)
	armed, _ = a.Armed("north", now.Add(24*time.Hour+time.Second))
	assert.True(t, armed, "the saved disarm must end within max_disarm of the start")
	assert.Contains(t, logs.String(), path)
	assert.Contains(t, logs.String(), "north")
	assert.Contains(t, logs.String(), "max_disarm")
	assert.Contains(t, logs.String(), "9999-12-30")

	// The file now holds the clamped disarm; the original is kept aside.
	b, err := New(Config{Cameras: []string{"north"}, StatePath: path, MaxDisarm: 24 * time.Hour}, now.Add(time.Hour))
	require.NoError(t, err)
	armed, _ = b.Armed("north", now.Add(24*time.Hour+time.Second))
	assert.True(t, armed)
	aside := asideFiles(t, path)
	require.Len(t, aside, 1)
	kept, err := os.ReadFile(aside[0])
	require.NoError(t, err)
	assert.Equal(t, orig, string(kept))
}

// One bad record must not cost the good ones: each record is checked on
// its own, a camera whose record is bad comes up armed for safety, and
// the file as found is kept aside with a log line per problem.
func TestArmingValidatesEachRecord(t *testing.T) {
	now := utc(2026, 12, 2, 22, 0)
	path := filepath.Join(t.TempDir(), "arming.json")
	orig := `{"v":1,"overrides":{
  "north":{"armed":false,"until":"2026-12-02T23:00:00Z","by":"http:alice"},
  "south":{"armed":false,"until":"0001-01-01T00:00:00Z"},
  "east":{"armed":false,"until":"2026-12-02T23:00:00Z","by":"a\u0007b"},
  "west":null,
  "gone":{"armed":false,"until":"2026-12-02T23:00:00Z"}}}`
	require.NoError(t, os.WriteFile(path, []byte(orig), 0o600))
	var logs bytes.Buffer
	cams := []string{"north", "south", "east", "west"}
	sched := mustSchedule(t, "UTC", "daily 06:00-07:00") // disarmed at 22:00
	a, err := New(Config{Cameras: cams, StatePath: path, Default: sched, Log: logTo(&logs)}, now)
	require.NoError(t, err, "bad records are no reason to fail the whole file")

	armed, _ := a.Armed("north", now)
	assert.False(t, armed, "the good record survives")
	for _, id := range []string{"south", "east", "west"} {
		armed, reason := a.Armed(id, now)
		assert.True(t, armed, "%s: a bad record fails armed", id)
		assert.Contains(t, reason, "unreadable", id)
		assert.Contains(t, logs.String(), "camera="+id)
	}
	assert.Contains(t, logs.String(), "no until")
	assert.Contains(t, logs.String(), "by")
	assert.Contains(t, logs.String(), "camera=gone")
	assert.Contains(t, logs.String(), path)
	aside := asideFiles(t, path)
	require.Len(t, aside, 1)
	assert.Contains(t, logs.String(), aside[0])
	kept, err := os.ReadFile(aside[0])
	require.NoError(t, err)
	assert.Equal(t, orig, string(kept))

	// Fail-safe survives a restart until an operator acts.
	b, err := New(Config{Cameras: cams, StatePath: path, Default: sched}, now)
	require.NoError(t, err)
	armed, _ = b.Armed("south", now)
	assert.True(t, armed, "fail-safe is kept across a restart")
	armed, _ = b.Armed("north", now)
	assert.False(t, armed)
	require.NoError(t, b.Clear("south", "test", now))
	armed, _ = b.Armed("south", now)
	assert.False(t, armed, "a clear ends fail-safe")
	assert.Len(t, asideFiles(t, path), 1, "a clean file is not moved aside again")
}

// FuzzArmingState feeds arbitrary bytes as the saved state. Whatever the
// file holds: no panic, a usable *Arming, no camera disarmed past
// max_disarm from the start, and loading the file left behind gives the
// same state without another rewrite.
func FuzzArmingState(f *testing.F) {
	for _, s := range []string{
		`{"v":1,"overrides":{"north":{"armed":false,"until":"2026-12-02T23:00:00Z","by":"http:alice"}}}`,
		`{"v":1,"overrides":{"north":{"armed":false,"until":"9999-12-31T00:00:00Z"}}}`,
		`{"v":1,"overrides":{"south":{"armed":true,"until":"9999-12-31T00:00:00Z"}},"fail_safe":["north"]}`,
		`{"v":1,"overrides":{"north":null,"south":{"armed":false}}}`,
		`{"v":2}`,
		`{not json`,
		``,
	} {
		f.Add([]byte(s))
	}
	now := utc(2026, 12, 2, 22, 0)
	const max = 6 * time.Hour
	cams := []string{"north", "south"}
	f.Fuzz(func(t *testing.T, data []byte) {
		path := filepath.Join(t.TempDir(), "arming.json")
		require.NoError(t, os.WriteFile(path, data, 0o600))
		cfg := Config{Cameras: cams, StatePath: path, MaxDisarm: max}
		a, err := New(cfg, now)
		if err != nil {
			require.ErrorIs(t, err, ErrStateUnreadable)
		}
		require.NotNil(t, a)
		for _, id := range cams {
			armed, reason := a.Armed(id, now.Add(max+time.Second))
			require.True(t, armed, "%s disarmed past max_disarm: %s", id, reason)
		}
		first := a.Status(now)
		nAside := len(asideFiles(t, path))
		b, err := New(cfg, now)
		require.NoError(t, err, "the file left behind must load cleanly")
		assert.Equal(t, first, b.Status(now))
		assert.Len(t, asideFiles(t, path), nAside, "a clean file is not moved aside")
	})
}

// Shortening max_disarm on a reload cuts a running disarm to the new bound.
func TestArmingSetMaxDisarmCutsRunningDisarm(t *testing.T) {
	now := utc(2026, 12, 2, 22, 0)
	path := filepath.Join(t.TempDir(), "arming.json")
	a, err := New(Config{Cameras: []string{"north", "south"}, StatePath: path, MaxDisarm: 24 * time.Hour}, now)
	require.NoError(t, err)
	require.NoError(t, a.DisarmUntil("north", now.Add(20*time.Hour), "http:owner", now))
	require.NoError(t, a.DisarmUntil("south", now.Add(time.Hour), "http:owner", now))
	cut, err := a.SetMaxDisarm(2*time.Hour, now.Add(time.Minute))
	require.NoError(t, err)
	assert.Equal(t, []string{"north"}, cut)
	armed, _ := a.Armed("north", now.Add(2*time.Hour+2*time.Minute))
	assert.True(t, armed)
	armed, _ = a.Armed("south", now.Add(30*time.Minute))
	assert.False(t, armed, "a disarm inside the new bound is left alone")
	require.Error(t, a.DisarmUntil("south", now.Add(3*time.Hour), "x", now))
	b, err := New(Config{Cameras: []string{"north", "south"}, StatePath: path, MaxDisarm: 2 * time.Hour}, now.Add(time.Minute))
	require.NoError(t, err)
	armed, _ = b.Armed("north", now.Add(2*time.Hour+2*time.Minute))
	assert.True(t, armed, "the cut disarm was saved")
}
