package alert

import (
	"math"
	"slices"
	"time"
)

// AlarmConfig sets when a track becomes an alarm and how it is reported.
type AlarmConfig struct {
	// Persist is how long a track must be seen inside the pool before it
	// raises an alarm.
	Persist time.Duration
	// UpdateEvery is the interval between target updates while an alarm lasts.
	UpdateEvery time.Duration
	// ClearAfter is how long an alarmed track must be unseen to be cleared.
	ClearAfter time.Duration
	// MinHitRatio is the least share of frames since a track began in which
	// it must have been detected before it can raise an alarm: water makes
	// short-lived blobs that a nearest-neighbour tracker can chain.
	MinHitRatio float64
	// MaxSpeed, m/s, is the fastest a track may move and still raise an
	// alarm: a bird gliding over the water is faster than a child can swim
	// (from memory: small children swim well under 1.5 m/s). Zero is no limit.
	MaxSpeed float64
}

// DefaultAlarm is 0.7 s persistence, 2 Hz updates and 3 s clearing.
func DefaultAlarm() AlarmConfig {
	return AlarmConfig{Persist: 700 * time.Millisecond, UpdateEvery: 500 * time.Millisecond, ClearAfter: 3 * time.Second, MinHitRatio: 0.7, MaxSpeed: 2.0}
}

// Observation is one live track as the alarm sees it, in pool metres.
type Observation struct {
	Track       int
	X, Y        float64
	VX, VY      float64
	Area        float64
	First, Last time.Duration // media time
	Hits        int
}

// Decision is what the alarm wants published for one track.
type Decision struct {
	Kind       string // KindTarget or KindCleared
	Event      string // "start" or "update" for targets
	Obs        Observation
	Dwell      time.Duration
	Confidence float64
}

// Alarm turns tracks into target and cleared decisions. Not safe for
// concurrent use.
type Alarm struct {
	cfg    AlarmConfig
	fps    float64
	active map[int]*alarmed
}

type alarmed struct {
	obs      Observation
	lastSent time.Duration
}

// NewAlarm returns an alarm with no active targets. fps is the nominal frame
// rate, used only for confidence.
func NewAlarm(cfg AlarmConfig, fps float64) *Alarm {
	if fps <= 0 {
		fps = 10
	}
	return &Alarm{cfg: cfg, fps: fps, active: map[int]*alarmed{}}
}

// Step takes the tracks seen at media time now. When armed is false no new
// alarm starts and no updates go out; live alarms still clear. Targets come
// in the order of tracks, then cleared decisions in track order. A track
// is cleared ClearAfter after it was last seen, whether or not tracks
// still lists it.
func (a *Alarm) Step(now time.Duration, tracks []Observation, armed bool) []Decision {
	var out []Decision
	for _, o := range tracks {
		if o.Last != now {
			continue // kept alive by the tracker but not seen in this frame
		}
		dwell := o.Last - o.First
		if act, ok := a.active[o.Track]; ok {
			act.obs = o
			if armed && now-act.lastSent >= a.cfg.UpdateEvery {
				act.lastSent = now
				out = append(out, Decision{Kind: KindTarget, Event: "update", Obs: o, Dwell: dwell, Confidence: a.confidence(o)})
			}
			continue
		}
		fast := a.cfg.MaxSpeed > 0 && math.Hypot(o.VX, o.VY) > a.cfg.MaxSpeed
		if armed && dwell >= a.cfg.Persist && a.hitRatio(o) >= a.cfg.MinHitRatio && !fast {
			a.active[o.Track] = &alarmed{obs: o, lastSent: now}
			out = append(out, Decision{Kind: KindTarget, Event: "start", Obs: o, Dwell: dwell, Confidence: a.confidence(o)})
		}
	}
	// Clearing goes by the time since the last sighting alone, whether or
	// not the tracker still lists the track; in track order, so that
	// replays repeat.
	var gone []int
	for id, act := range a.active {
		if now-act.obs.Last >= a.cfg.ClearAfter {
			gone = append(gone, id)
		}
	}
	slices.Sort(gone)
	for _, id := range gone {
		act := a.active[id]
		out = append(out, Decision{Kind: KindCleared, Obs: act.obs, Dwell: act.obs.Last - act.obs.First})
		delete(a.active, id)
	}
	return out
}

// Active returns the number of tracks in alarm.
func (a *Alarm) Active() int { return len(a.active) }

func (a *Alarm) hitRatio(o Observation) float64 {
	expected := (o.Last-o.First).Seconds()*a.fps + 1
	return math.Min(1, float64(o.Hits)/expected)
}

func (a *Alarm) confidence(o Observation) float64 {
	span := (o.Last - o.First).Seconds()
	c := a.hitRatio(o)
	if p := a.cfg.Persist.Seconds(); p > 0 && span < 2*p {
		c *= 0.5 + 0.5*span/(2*p)
	}
	return math.Round(c*1000) / 1000
}
