package synth

import "math"

// whoMedian is one row of the WHO Child Growth Standards medians:
// length/height for age and head circumference for age, boys and girls
// (WHO Multicentre Growth Reference Study Group, 2006), with a shoulder
// breadth from memory (0.22–0.26 m for 1–4 year olds).
type whoMedian struct {
	months            float64
	lenBoy, lenGirl   float64 // cm
	headBoy, headGirl float64 // cm
	shoulder          float64 // m
}

var whoMedians = []whoMedian{
	{12, 75.7, 74.0, 46.1, 44.9, 0.22},
	{24, 87.8, 86.4, 48.3, 47.2, 0.235},
	{36, 96.1, 95.1, 49.5, 48.5, 0.25},
	{48, 103.3, 102.7, 50.2, 49.3, 0.26},
}

// BodySize is a child's body: standing height, head diameter (head
// circumference / π) and shoulder breadth, metres.
type BodySize struct {
	HeightM, HeadM, ShoulderM float64
}

// BodyForAge interpolates the WHO medians linearly in age (12–48 months,
// clamped) for a girl or a boy.
func BodyForAge(months float64, girl bool) BodySize {
	m := math.Max(12, math.Min(48, months))
	i := 1
	for i < len(whoMedians)-1 && whoMedians[i].months < m {
		i++
	}
	a, b := whoMedians[i-1], whoMedians[i]
	f := (m - a.months) / (b.months - a.months)
	lerp := func(x, y float64) float64 { return x + f*(y-x) }
	if girl {
		return BodySize{lerp(a.lenGirl, b.lenGirl) / 100, lerp(a.headGirl, b.headGirl) / 100 / math.Pi, lerp(a.shoulder, b.shoulder)}
	}
	return BodySize{lerp(a.lenBoy, b.lenBoy) / 100, lerp(a.headBoy, b.headBoy) / 100 / math.Pi, lerp(a.shoulder, b.shoulder)}
}
