package tuning

import "stillwater/vision/synth"

// ScenarioByName is one of synth.Scenarios.
func ScenarioByName(name string, seed int64) (synth.Scene, bool) {
	s, ok := synth.Scenarios(seed)[name]
	return s, ok
}

// ScenarioNames lists the named scenes of synth.Scenarios.
func ScenarioNames() []string { return synth.ScenarioNames() }

// FloatingChild draws a scene's children floating at the surface, the
// posture of a drowning. The named scenes draw an upright child as its
// head and shoulders alone (about 0.03 m² from above), the size of a
// resting bird, which the rectified detector does not report until it
// shows a body (MinBodyArea).
func FloatingChild(s *synth.Scene) {
	for i := range s.Intruders {
		s.Intruders[i].Lying = true
	}
}
