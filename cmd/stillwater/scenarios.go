package main

import "stillwater/vision/synth"

// scenarioByName is one of synth.Scenarios.
func scenarioByName(name string, seed int64) (synth.Scene, bool) {
	s, ok := synth.Scenarios(seed)[name]
	return s, ok
}

func scenarioNames() []string { return synth.ScenarioNames() }

// floatingChild draws a scene's children floating at the surface, the
// posture of a drowning. The named scenes draw an upright child as its
// head and shoulders alone (about 0.03 m² from above), the size of a
// resting bird, which the rectified detector does not report until it
// shows a body (MinBodyArea).
func floatingChild(s *synth.Scene) {
	for i := range s.Intruders {
		s.Intruders[i].Lying = true
	}
}
