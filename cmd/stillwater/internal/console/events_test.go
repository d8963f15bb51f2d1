package console

import (
	"testing"
	"testing/fstest"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"stillwater/alert"
)

func encode(t *testing.T, m any) []byte {
	t.Helper()
	b, err := alert.Encode(m)
	require.NoError(t, err)
	return b
}

func TestRecorderTurnsMessagesIntoEvents(t *testing.T) {
	at := time.Date(2026, 12, 2, 14, 3, 4, 0, time.UTC)
	start := alert.Target{V: 1, Kind: alert.KindTarget, Camera: "deck", Track: 7, Seq: 11, Event: "start", FrameTime: at,
		Surface: alert.Position{X: 3.25, Y: 1.5}, Dwell: 1.2, Confidence: 0.8, Evidence: "evidence/deck-x-track7.jpg"}
	update := start
	update.Event, update.Seq = "update", 12
	tests := []struct {
		name string
		kind string
		msg  any
		want *Event // nil: no event
	}{
		{"alarm start", alert.KindTarget, start, &Event{ID: "deck-11-alarm", Kind: EventAlarm, Camera: "deck", Time: at,
			Text: "Someone in the water while armed: track 7, 80 % sure, in view for 1.2 s.", Track: 7, Position: &[2]float64{3.25, 1.5}, Snapshot: "deck-x-track7.jpg"}},
		{"alarm update is not an event", alert.KindTarget, update, nil},
		{"cleared", alert.KindCleared, alert.Cleared{V: 1, Kind: alert.KindCleared, Camera: "deck", Track: 7, Seq: 13, FrameTime: at, Last: alert.Position{X: 3, Y: 1}, Duration: 9.5},
			&Event{ID: "deck-13-cleared", Kind: EventAlarmCleared, Camera: "deck", Time: at, Text: "Track 7 no longer seen, after 9.5 s.", Track: 7, Position: &[2]float64{3, 1}}},
		{"fault", alert.KindFault, alert.NewFault("deck", 14, at, alert.FaultCameraLost, true, "no frame for 6.0 s"),
			&Event{ID: "deck-14-fault", Kind: EventFault, Camera: "deck", Time: at, Text: "No frames from the camera: the pool is not watched: no frame for 6.0 s."}},
		{"fault cleared", alert.KindFault, alert.NewFault("deck", 15, at, alert.FaultCameraLost, false, ""),
			&Event{ID: "deck-15-fault", Kind: EventFaultCleared, Camera: "deck", Time: at, Text: "Frames from the camera again."}},
		{"heartbeat is not an event", alert.KindBeat, alert.Heartbeat{V: 1, Kind: alert.KindBeat, Camera: "deck"}, nil},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			r := NewRecorder(4)
			require.NoError(t, r.Message(tc.kind, encode(t, tc.msg)))
			got := r.Events(10)
			if tc.want == nil {
				assert.Empty(t, got)
				return
			}
			require.Len(t, got, 1)
			assert.Equal(t, *tc.want, got[0])
		})
	}
}

func TestRecorderRefusesWhatDoesNotDecode(t *testing.T) {
	r := NewRecorder(4)
	require.NoError(t, r.Message(alert.KindFault, encode(t, alert.NewFault("deck", 1, time.Unix(0, 0), alert.FaultCameraFrozen, true, ""))))
	for _, kind := range []string{alert.KindTarget, alert.KindCleared, alert.KindFault} {
		err := r.Message(kind, []byte(`{"camera": 3`))
		require.Error(t, err)
		assert.Contains(t, err.Error(), "record "+kind+" message")
	}
	assert.Len(t, r.Events(10), 1, "what was recorded is kept")
}

func TestRecorderKeepsTheNewest(t *testing.T) {
	r := NewRecorder(3)
	for i := 1; i <= 5; i++ {
		require.NoError(t, r.Message(alert.KindFault, encode(t, alert.NewFault("deck", uint64(i), time.Unix(int64(i), 0), alert.FaultCameraNoise, i%2 == 1, ""))))
	}
	var ids []string
	for _, e := range r.Events(10) {
		ids = append(ids, e.ID)
	}
	assert.Equal(t, []string{"deck-5-fault", "deck-4-fault", "deck-3-fault"}, ids)
	assert.Len(t, r.Events(2), 2)
}

func TestRecorderActiveFaults(t *testing.T) {
	r := NewRecorder(8)
	t0 := time.Date(2026, 12, 2, 14, 0, 0, 0, time.UTC)
	send := func(cam, kind string, active bool, at time.Time) {
		require.NoError(t, r.Message(alert.KindFault, encode(t, alert.NewFault(cam, 1, at, kind, active, ""))))
	}
	send("deck", alert.FaultCameraFrozen, true, t0)
	send("deck", alert.FaultCameraNoise, true, t0.Add(time.Second))
	send("deck", alert.FaultCameraFrozen, true, t0.Add(time.Minute)) // repeated: keeps its first time
	send("pier", alert.FaultCameraLost, true, t0)
	f := r.Faults("deck")
	require.Len(t, f, 2)
	assert.Equal(t, alert.FaultCameraFrozen, f[0].Kind)
	assert.Equal(t, t0, f[0].Since)
	assert.Equal(t, "The camera repeats the same frame: the pool is not watched.", f[0].Detail)
	send("deck", alert.FaultCameraFrozen, false, t0.Add(2*time.Minute))
	f = r.Faults("deck")
	require.Len(t, f, 1)
	assert.Equal(t, alert.FaultCameraNoise, f[0].Kind)
	assert.Len(t, r.Faults("pier"), 1)
	assert.NotNil(t, r.Faults("nowhere"))
}

func TestWithEvidence(t *testing.T) {
	fsys := fstest.MapFS{"a.jpg": {}, "a.mp4": {}, "b.jpg": {}, "b.avi": {}, "c.jpg": {}, "d.mp4": {}}
	in := []Event{
		{ID: "a", Snapshot: "a.jpg"},
		{ID: "b", Snapshot: "b.jpg"},
		{ID: "c", Snapshot: "c.jpg"},
		{ID: "gone", Snapshot: "d.jpg"},
		{ID: "fault"},
	}
	out := WithEvidence(in, fsys)
	assert.Equal(t, "a.mp4", out[0].Clip)
	assert.Equal(t, "b.avi", out[1].Clip)
	assert.Equal(t, Event{ID: "c", Snapshot: "c.jpg"}, out[2], "no clip written yet")
	assert.Empty(t, out[3].Snapshot, "a snapshot retention removed is not offered")
	assert.Equal(t, "d.mp4", out[3].Clip, "its clip still is")
	assert.Equal(t, Event{ID: "fault"}, out[4])
	assert.Empty(t, in[0].Clip, "the input is not changed")
	assert.Empty(t, WithEvidence(nil, fsys))
}
