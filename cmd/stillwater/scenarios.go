package main

import (
	"sort"

	"stillwater/vision/synth"
)

// scenarios are the named synthetic scenes. The names are part of the
// command line (synth -scenario, the scenario suite).
func scenarios(seed int64) map[string]synth.Scene {
	base := synth.Default()
	base.Seed = seed
	child := func(s synth.Scene) synth.Scene {
		s.Intruders = []synth.Intruder{{
			Enter:     8,
			Path:      []synth.Waypoint{{T: 8, X: 1.2, Y: 0.8}, {T: 12, X: 3.0, Y: 1.8}, {T: 16, X: 5.0, Y: 2.4}},
			AgeMonths: 24, Contrast: 1,
		}}
		return s
	}
	m := map[string]synth.Scene{
		"empty": base,
		"child": child(base),
	}
	return m
}

func scenarioByName(name string, seed int64) (synth.Scene, bool) {
	s, ok := scenarios(seed)[name]
	return s, ok
}

func scenarioNames() []string {
	var out []string
	for k := range scenarios(1) {
		out = append(out, k)
	}
	sort.Strings(out)
	return out
}
