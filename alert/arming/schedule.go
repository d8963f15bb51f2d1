package arming

import (
	"errors"
	"fmt"
	"sort"
	"strconv"
	"strings"
	"time"
)

// scheduleExample is quoted in every window error as the fix.
const scheduleExample = `"mon-fri 18:00-08:00", "sat,sun 20:00-09:00" or "daily 00:00-24:00"`

// Schedule is a set of weekly armed windows in one IANA time zone. Windows
// are written as "DAYS HH:MM-HH:MM" in local wall-clock time:
//
//   - "mon-fri 18:00-08:00"   weekdays from 18:00 to 08:00 the next morning
//   - "sat,sun 20:00-09:00"
//   - "daily 00:00-24:00"     always
//
// DAYS is "daily" or a comma list of mon, tue, wed, thu, fri, sat, sun and
// ranges of them (ranges may wrap, "fri-mon"). A window whose end is not
// after its start crosses midnight and belongs to the day it starts on.
// 24:00 is allowed only as an end. Windows may overlap; the schedule is
// armed when any window is.
//
// Boundaries are wall-clock times, resolved per date in the zone so that DST
// changes move them with the clock: a boundary inside a spring-forward gap
// takes effect when the gap ends, and one inside a repeated autumn hour at
// its first occurrence. A Schedule is immutable and safe for concurrent use.
type Schedule struct {
	loc     *time.Location
	windows []window
}

type window struct {
	text       string
	days       [7]bool // indexed by time.Weekday
	start, end int     // minutes after local midnight; end may be 1440
}

var weekdays = map[string]time.Weekday{
	"sun": time.Sunday, "mon": time.Monday, "tue": time.Tuesday, "wed": time.Wednesday,
	"thu": time.Thursday, "fri": time.Friday, "sat": time.Saturday,
}

// ParseSchedule parses windows (see Schedule for the syntax) in the IANA
// time zone named by zone, such as "Europe/Berlin". "Local" and the empty
// name are refused because they depend on the machine.
func ParseSchedule(zone string, windows []string) (*Schedule, error) {
	if zone == "" || zone == "Local" {
		return nil, fmt.Errorf("schedule zone %q: name the zone explicitly, e.g. \"Europe/Berlin\" or \"UTC\"", zone)
	}
	loc, err := time.LoadLocation(zone)
	if err != nil {
		return nil, fmt.Errorf("schedule zone %q: %w; use an IANA name such as \"Europe/Berlin\"", zone, err)
	}
	return ParseScheduleIn(loc, windows)
}

// ParseScheduleIn parses windows in loc, a zone the caller has already
// resolved (the machine's own zone, for instance, found under its IANA
// name). Reasons and status show times in loc.
func ParseScheduleIn(loc *time.Location, windows []string) (*Schedule, error) {
	if loc == nil {
		return nil, errors.New("schedule zone: none given")
	}
	if len(windows) == 0 {
		return nil, fmt.Errorf("schedule: no windows; add at least one, e.g. %s", scheduleExample)
	}
	s := &Schedule{loc: loc}
	for i, text := range windows {
		w, err := parseWindow(text)
		if err != nil {
			return nil, fmt.Errorf("schedule window %d %q: %w; write it like %s", i, text, err, scheduleExample)
		}
		s.windows = append(s.windows, w)
	}
	return s, nil
}

func parseWindow(text string) (window, error) {
	w := window{text: text}
	fields := strings.Fields(strings.ToLower(text))
	if len(fields) != 2 {
		return w, fmt.Errorf("want two parts, days and times, separated by a space, got %d", len(fields))
	}
	if err := parseDays(fields[0], &w.days); err != nil {
		return w, err
	}
	from, to, ok := strings.Cut(fields[1], "-")
	if !ok {
		return w, fmt.Errorf("times %q: want HH:MM-HH:MM", fields[1])
	}
	var err error
	if w.start, err = parseClock(from); err != nil {
		return w, fmt.Errorf("start: %w", err)
	}
	if w.end, err = parseClock(to); err != nil {
		return w, fmt.Errorf("end: %w", err)
	}
	if w.start == 24*60 {
		return w, fmt.Errorf("start 24:00 is the next day's 00:00; start at 00:00 on that day")
	}
	if w.start == w.end {
		return w, fmt.Errorf("start equals end, an empty or ambiguous window; use 00:00-24:00 for a whole day")
	}
	return w, nil
}

func parseDays(s string, days *[7]bool) error {
	if s == "daily" {
		for i := range days {
			days[i] = true
		}
		return nil
	}
	for _, item := range strings.Split(s, ",") {
		a, b, isRange := strings.Cut(item, "-")
		from, ok := weekdays[a]
		if !ok {
			return fmt.Errorf("day %q: want daily or mon, tue, wed, thu, fri, sat, sun, lists (sat,sun) and ranges (mon-fri)", a)
		}
		to := from
		if isRange {
			if to, ok = weekdays[b]; !ok {
				return fmt.Errorf("day %q: want mon, tue, wed, thu, fri, sat or sun", b)
			}
		}
		// Walk forward so that ranges may wrap past Sunday.
		for d := from; ; d = (d + 1) % 7 {
			days[d] = true
			if d == to {
				break
			}
		}
	}
	return nil
}

// parseClock reads H:MM or HH:MM, 00:00 to 24:00, into minutes.
func parseClock(s string) (int, error) {
	hs, ms, ok := strings.Cut(s, ":")
	if !ok || len(hs) < 1 || len(hs) > 2 || len(ms) != 2 || !digits(hs) || !digits(ms) {
		return 0, fmt.Errorf("time %q: want HH:MM on a 24-hour clock", s)
	}
	h, _ := strconv.Atoi(hs)
	m, _ := strconv.Atoi(ms)
	if h > 24 || m > 59 || (h == 24 && m != 0) {
		return 0, fmt.Errorf("time %q: want 00:00 to 23:59, or 24:00 as an end", s)
	}
	return h*60 + m, nil
}

func digits(s string) bool {
	for _, r := range s {
		if r < '0' || r > '9' {
			return false
		}
	}
	return true
}

// Location returns the schedule's time zone.
func (s *Schedule) Location() *time.Location { return s.loc }

// Armed reports whether t falls in an armed window. Any time zone of t is
// fine; the schedule's own zone decides.
func (s *Schedule) Armed(t time.Time) bool {
	_, ok := s.armedBy(t)
	return ok
}

// armedBy returns the index of the first window that covers t.
func (s *Schedule) armedBy(t time.Time) (int, bool) {
	today := civilDate(t.In(s.loc))
	for i, w := range s.windows {
		// A window lasts at most a day, so only yesterday's and today's
		// occurrences can cover t.
		for back := 1; back >= 0; back-- {
			start, end, ok := s.occurrence(w, today.AddDate(0, 0, -back))
			if ok && !t.Before(start) && t.Before(end) {
				return i, true
			}
		}
	}
	return -1, false
}

// Next returns the first instant after t at which Armed changes, and false
// when it never does (a schedule armed all week). The instant is in the
// schedule's zone.
func (s *Schedule) Next(t time.Time) (time.Time, bool) {
	today := civilDate(t.In(s.loc))
	var edges []time.Time
	// Boundaries from yesterday to eight days ahead: the schedule repeats
	// weekly, so a change that is not among them never comes.
	for d := -1; d <= 8; d++ {
		day := today.AddDate(0, 0, d)
		for _, w := range s.windows {
			if start, end, ok := s.occurrence(w, day); ok {
				edges = append(edges, start, end)
			}
		}
	}
	sort.Slice(edges, func(i, j int) bool { return edges[i].Before(edges[j]) })
	now := s.Armed(t)
	for _, e := range edges {
		if e.After(t) && s.Armed(e) != now {
			return e.In(s.loc), true
		}
	}
	return time.Time{}, false
}

// occurrence returns the instants at which w starts and ends when it starts
// on day (a civil date held as midnight UTC). ok is false when w is not
// armed on that weekday.
func (s *Schedule) occurrence(w window, day time.Time) (start, end time.Time, ok bool) {
	if !w.days[day.Weekday()] {
		return time.Time{}, time.Time{}, false
	}
	endDay := day
	if w.end <= w.start {
		endDay = day.AddDate(0, 0, 1)
	}
	start = wallInstant(day.Add(time.Duration(w.start)*time.Minute), s.loc)
	end = wallInstant(endDay.Add(time.Duration(w.end)*time.Minute), s.loc)
	return start, end, true
}

// civilDate returns the calendar date of t's wall clock as midnight UTC, a
// zone-free value on which AddDate counts calendar days, not 24 h spans.
func civilDate(t time.Time) time.Time {
	y, m, d := t.Date()
	return time.Date(y, m, d, 0, 0, 0, 0, time.UTC)
}

// wallInstant returns the first instant at which the clock in loc reads
// wall (given as a UTC value holding the wall-clock reading) or later. It
// exists because time.Date's choice in DST gaps and repeats is unspecified
// and does differ between zones.
func wallInstant(wall time.Time, loc *time.Location) time.Time {
	// Offsets lie within -12 h and +14 h, so the instant does too; take the
	// offsets in force at both ends of that span.
	lo, hi := wall.Add(-14*time.Hour), wall.Add(12*time.Hour)
	var best time.Time
	for _, probe := range []time.Time{lo, hi} {
		_, off := probe.In(loc).Zone()
		u := wall.Add(-time.Duration(off) * time.Second)
		if _, got := u.In(loc).Zone(); got == off && (best.IsZero() || u.Before(best)) {
			best = u
		}
	}
	if !best.IsZero() {
		return best
	}
	// wall falls in a gap: the clock jumps over it, and the first reading at
	// or past wall is at the jump. Search it to the second.
	reads := func(u time.Time) time.Time {
		_, off := u.In(loc).Zone()
		return u.Add(time.Duration(off) * time.Second)
	}
	a, b := lo.Unix(), hi.Unix()
	for a < b {
		mid := a + (b-a)/2
		if reads(time.Unix(mid, 0)).Before(wall) {
			a = mid + 1
		} else {
			b = mid
		}
	}
	return time.Unix(a, 0)
}

// Override is an operator's manual arming or disarming that lasts until
// Until, an instant (any zone; stored as RFC 3339). A zero Until means no
// override.
type Override struct {
	Armed bool      `json:"armed"`
	Until time.Time `json:"until"`
	By    string    `json:"by,omitempty"` // who set it, for reasons and status
}

// Active reports whether the override still applies at now.
func (o Override) Active(now time.Time) bool { return !o.Until.IsZero() && now.Before(o.Until) }
