package alert

import (
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
