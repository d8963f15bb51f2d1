package tuning

import (
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

func TestGrid(t *testing.T) {
	g := Grid([]float64{12, 16}, []float64{0.01}, []time.Duration{time.Second, 2 * time.Second})
	require.Len(t, g, 4)
	assert.Equal(t, sweepPoint{Threshold: 12, MinArea: 0.01, Persist: time.Second}, g[0])
	assert.Equal(t, sweepPoint{Threshold: 16, MinArea: 0.01, Persist: 2 * time.Second}, g[3])
}

func TestBest(t *testing.T) {
	hour := 1.0
	res := func(th float64, det, fals int, delays ...float64) sweepResult {
		return sweepResult{Point: sweepPoint{Threshold: th}, Total: scoreTotal{Presences: 2, Detected: det, False: fals, FreeHours: hour, Delays: delays}}
	}
	tests := []struct {
		name   string
		rs     []sweepResult
		budget float64
		want   float64 // threshold of the winner
		ok     bool
	}{
		// 12 detects both but raises 3 false alarms in the hour; within a
		// budget of 1/h the choice is between 16 (worst delay 1.5 s) and 24
		// (one detection): 16.
		{"budget excludes the noisy one", []sweepResult{res(12, 2, 3, 0.5, 0.6), res(16, 2, 1, 1.0, 1.5), res(24, 1, 0, 1.2)}, 1, 16, true},
		{"looser budget", []sweepResult{res(12, 2, 3, 0.5, 0.6), res(16, 2, 1, 1.0, 1.5)}, 5, 12, true},
		{"same detections, smaller worst delay", []sweepResult{res(16, 2, 0, 0.9, 1.9), res(20, 2, 0, 1.1, 1.2)}, 0, 20, true},
		{"nothing within budget", []sweepResult{res(12, 2, 3)}, 0, 0, false},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			b, ok := Best(tt.rs, tt.budget)
			require.Equal(t, tt.ok, ok)
			if ok {
				assert.Equal(t, tt.want, b.Point.Threshold)
			}
		})
	}
}
