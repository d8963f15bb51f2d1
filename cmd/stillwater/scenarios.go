package main

import "stillwater/vision/synth"

// scenarioByName is one of synth.Scenarios.
func scenarioByName(name string, seed int64) (synth.Scene, bool) {
	s, ok := synth.Scenarios(seed)[name]
	return s, ok
}

func scenarioNames() []string { return synth.ScenarioNames() }
