package alert

import (
	"slices"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

func ms(n int) time.Duration { return time.Duration(n) * time.Millisecond }

func TestAlarmPersistUpdateClear(t *testing.T) {
	a := NewAlarm(AlarmConfig{Persist: ms(700), UpdateEvery: ms(500), ClearAfter: ms(1000), MinHitRatio: 0.7}, 10)
	var kinds []string
	var at []time.Duration
	for i := 0; i <= 30; i++ {
		now := ms(100 * i)
		var obs []Observation
		if i <= 15 {
			obs = []Observation{{Track: 1, X: 2, Y: 1, First: 0, Last: now, Hits: i + 1}}
		}
		for _, d := range a.Step(now, obs, true) {
			kinds = append(kinds, d.Kind+"/"+d.Event)
			at = append(at, now)
		}
	}
	// Start at 0.7 s, an update 0.5 s later while still seen, cleared 1 s
	// after the last sighting at 1.5 s.
	require.Equal(t, []string{"target/start", "target/update", "cleared/"}, kinds)
	assert.Equal(t, []time.Duration{ms(700), ms(1200), ms(2500)}, at)
}

func TestAlarmNeedsConsistentTrackAndArming(t *testing.T) {
	a := NewAlarm(AlarmConfig{Persist: ms(700), UpdateEvery: ms(500), ClearAfter: ms(1000), MinHitRatio: 0.7}, 10)
	// Seen in only 4 of 9 frames over 0.8 s: a chain of ripples.
	got := a.Step(ms(800), []Observation{{Track: 1, First: 0, Last: ms(800), Hits: 4}}, true)
	assert.Empty(t, got)
	// Consistent, but disarmed: nothing starts.
	got = a.Step(ms(800), []Observation{{Track: 2, First: 0, Last: ms(800), Hits: 9}}, false)
	assert.Empty(t, got)
	// Consistent and armed, but gliding at 3 m/s: a bird, not a swimmer.
	a.cfg.MaxSpeed = 2
	got = a.Step(ms(800), []Observation{{Track: 3, First: 0, Last: ms(800), Hits: 9, VX: 3}}, true)
	assert.Empty(t, got)
	got = a.Step(ms(900), []Observation{{Track: 2, First: 0, Last: ms(900), Hits: 10}}, true)
	require.Len(t, got, 1)
	assert.Equal(t, "start", got[0].Event)
	assert.Equal(t, 1, a.Active())
}

func TestSubjectAndTokens(t *testing.T) {
	assert.Equal(t, "stillwater.pool.target", Subject("stillwater", "pool", KindTarget))
	assert.NoError(t, ValidToken("north-pool_2"))
	for _, bad := range []string{"", "a.b", "a*", ">", "a b"} {
		assert.Error(t, ValidToken(bad), bad)
	}
}

// Clearing depends on the time since the track was last seen and on
// nothing else: not on whether the tracker still lists the track (it may
// drop a track sooner, or coast it longer, than ClearAfter), so a child
// who goes under for a moment is not cleared early, and a track coasted
// past ClearAfter is not kept in alarm.
func TestAlarmClearsOnTimeSinceLastSighting(t *testing.T) {
	const clearAfter = 1000
	cases := []struct {
		name   string
		listed bool // the tracker still passes the track, unseen, after its last sighting
		at     int  // ms after the last sighting
		clear  bool
	}{
		{"dropped by the tracker, before clear_after", false, clearAfter - 100, false},
		{"dropped by the tracker, at clear_after", false, clearAfter, true},
		{"still listed, before clear_after", true, clearAfter - 100, false},
		{"still listed, at clear_after", true, clearAfter, true},
		{"still listed, past clear_after", true, clearAfter + 500, true},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			a := NewAlarm(AlarmConfig{Persist: ms(300), UpdateEvery: ms(500), ClearAfter: ms(clearAfter), MinHitRatio: 0.7}, 10)
			seen := Observation{Track: 4, X: 2, Y: 1, First: 0, Last: ms(400), Hits: 5}
			require.Len(t, a.Step(ms(400), []Observation{seen}, true), 1, "the alarm starts")
			var tracks []Observation
			if c.listed {
				tracks = []Observation{seen} // Last stays at the last sighting
			}
			got := a.Step(ms(400+c.at), tracks, true)
			if !c.clear {
				assert.Empty(t, got)
				assert.Equal(t, 1, a.Active())
				return
			}
			require.Len(t, got, 1)
			assert.Equal(t, KindCleared, got[0].Kind)
			assert.Equal(t, ms(400), got[0].Obs.Last)
			assert.Equal(t, 0, a.Active())
		})
	}
}

// Tracks that clear in the same step come out in track order, whatever
// order the alarm holds them in, so that replays and their scores repeat.
func TestAlarmClearedInTrackOrder(t *testing.T) {
	ids := []int{12, 3, 7, 41, 5, 28, 9, 16}
	want := append([]int(nil), ids...)
	slices.Sort(want)
	// Go randomises map iteration: repeat so that an order that happened
	// to come out sorted once cannot pass.
	for run := 0; run < 20; run++ {
		a := NewAlarm(AlarmConfig{Persist: ms(300), UpdateEvery: ms(500), ClearAfter: ms(1000), MinHitRatio: 0.7}, 10)
		var tracks []Observation
		for i, id := range ids {
			tracks = append(tracks, Observation{Track: id, X: float64(i), Y: 1, First: 0, Last: ms(400), Hits: 5})
		}
		require.Len(t, a.Step(ms(400), tracks, true), len(ids))
		var got []int
		for _, d := range a.Step(ms(1400), nil, true) {
			require.Equal(t, KindCleared, d.Kind)
			got = append(got, d.Obs.Track)
		}
		require.Equal(t, want, got, "run %d", run)
	}
}

func TestControlSubjects(t *testing.T) {
	assert.Equal(t, "sw.control.disarm", ControlSubject("sw", ActionDisarm))
	assert.Equal(t, "sw.control.alice.disarm", UserControlSubject("sw", "alice", ActionDisarm))
	assert.Equal(t, []string{"sw.control.*", "sw.control.*.*"}, ControlSubjects("sw"))
	cases := []struct {
		subject, user, action string
		ok                    bool
	}{
		{"sw.control.arm", "", "arm", true},
		{"sw.control.alice.arm", "alice", "arm", true},
		{"sw.control.alice.arm.now", "", "", false},
		{"sw.control.", "", "", false},
		{"sw.north.target", "", "", false},
		{"other.control.arm", "", "", false},
	}
	for _, c := range cases {
		user, action, ok := ParseControlSubject("sw", c.subject)
		assert.Equal(t, c.ok, ok, c.subject)
		assert.Equal(t, c.user, user, c.subject)
		assert.Equal(t, c.action, action, c.subject)
	}
	assert.Error(t, ReservedCamera("control"))
	assert.Error(t, ReservedCamera(AllCameras))
	assert.NoError(t, ReservedCamera("north"))
}
