package arming

import (
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"
	_ "time/tzdata" // Go's own tz database, so results do not depend on the host's

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

func mustLoc(t testing.TB, name string) *time.Location {
	t.Helper()
	loc, err := time.LoadLocation(name)
	require.NoError(t, err)
	return loc
}

func utc(y int, m time.Month, d, h, min int) time.Time {
	return time.Date(y, m, d, h, min, 0, 0, time.UTC)
}

// The 2026 DST dates used below follow the EU rule (Directive 2000/84/EC:
// last Sunday of March and of October, at 01:00 UTC) and the US rule
// (Energy Policy Act of 2005: second Sunday of March and first Sunday of
// November, at 02:00 local). This test checks them against Go's tzdata.
func TestDSTDatesFromTzdata(t *testing.T) {
	cases := []struct {
		zone           string
		change         time.Time // first instant with the new offset
		before, after  int       // UTC offsets in seconds
		minDay, maxDay int       // where the rule puts the Sunday in its month
	}{
		{"Europe/Berlin", utc(2026, 3, 29, 1, 0), 3600, 7200, 25, 31},
		{"Europe/Berlin", utc(2026, 10, 25, 1, 0), 7200, 3600, 25, 31},
		{"America/New_York", utc(2026, 3, 8, 7, 0), -5 * 3600, -4 * 3600, 8, 14},
		{"America/New_York", utc(2026, 11, 1, 6, 0), -4 * 3600, -5 * 3600, 1, 7},
	}
	for _, c := range cases {
		t.Run(c.zone+" "+c.change.Format("2006-01-02"), func(t *testing.T) {
			loc := mustLoc(t, c.zone)
			_, before := c.change.Add(-time.Second).In(loc).Zone()
			_, after := c.change.In(loc).Zone()
			assert.Equal(t, c.before, before)
			assert.Equal(t, c.after, after)
			local := c.change.In(loc)
			assert.Equal(t, time.Sunday, local.Weekday())
			assert.GreaterOrEqual(t, local.Day(), c.minDay)
			assert.LessOrEqual(t, local.Day(), c.maxDay)
		})
	}
}

func TestScheduleArmedAndNext(t *testing.T) {
	type probe struct {
		at    time.Time
		armed bool
	}
	cases := []struct {
		name    string
		zone    string
		windows []string
		probes  []probe
		from    time.Time
		next    time.Time // zero: no change ever
	}{
		{
			// Sat 22:00 CET to Sun 06:00 CEST is 7 h of real time, not 8.
			name: "berlin spring night", zone: "Europe/Berlin", windows: []string{"daily 22:00-06:00"},
			probes: []probe{{utc(2026, 3, 28, 20, 59), false}, {utc(2026, 3, 28, 21, 0), true},
				{utc(2026, 3, 29, 3, 59), true}, {utc(2026, 3, 29, 4, 0), false}},
			from: utc(2026, 3, 28, 21, 0), next: utc(2026, 3, 29, 4, 0),
		},
		{
			// 02:30 does not exist that night: arming starts when the clock
			// jumps to 03:00 CEST (01:00 UTC).
			name: "berlin start in spring gap", zone: "Europe/Berlin", windows: []string{"sun 02:30-05:00"},
			probes: []probe{{utc(2026, 3, 29, 0, 59), false}, {utc(2026, 3, 29, 1, 0), true},
				{utc(2026, 3, 29, 2, 59), true}, {utc(2026, 3, 29, 3, 0), false}},
			from: utc(2026, 3, 29, 0, 0), next: utc(2026, 3, 29, 1, 0),
		},
		{
			// Sat 22:00 CEST to Sun 06:00 CET is 9 h.
			name: "berlin autumn night", zone: "Europe/Berlin", windows: []string{"daily 22:00-06:00"},
			probes: []probe{{utc(2026, 10, 24, 19, 59), false}, {utc(2026, 10, 24, 20, 0), true},
				{utc(2026, 10, 25, 4, 59), true}, {utc(2026, 10, 25, 5, 0), false}},
			from: utc(2026, 10, 25, 1, 0), next: utc(2026, 10, 25, 5, 0),
		},
		{
			// 02:30 happens twice; arming starts at the first (CEST) and
			// holds through the second until 04:00 CET.
			name: "berlin start in repeated hour", zone: "Europe/Berlin", windows: []string{"sun 02:30-04:00"},
			probes: []probe{{utc(2026, 10, 25, 0, 29), false}, {utc(2026, 10, 25, 0, 30), true},
				{utc(2026, 10, 25, 1, 30), true}, {utc(2026, 10, 25, 2, 59), true}, {utc(2026, 10, 25, 3, 0), false}},
			from: utc(2026, 10, 24, 12, 0), next: utc(2026, 10, 25, 0, 30),
		},
		{
			// 02:30 does not exist; time.Date alone would put it at 01:30 EST.
			name: "new york start in spring gap", zone: "America/New_York", windows: []string{"sun 02:30-03:30"},
			probes: []probe{{utc(2026, 3, 8, 6, 59), false}, {utc(2026, 3, 8, 7, 0), true},
				{utc(2026, 3, 8, 7, 29), true}, {utc(2026, 3, 8, 7, 30), false}},
			from: utc(2026, 3, 8, 7, 0), next: utc(2026, 3, 8, 7, 30),
		},
		{
			// From the first 01:30 (EDT) to 02:00 EST: 90 min of real time.
			name: "new york autumn repeated hour", zone: "America/New_York", windows: []string{"sun 01:30-02:00"},
			probes: []probe{{utc(2026, 11, 1, 5, 29), false}, {utc(2026, 11, 1, 5, 30), true},
				{utc(2026, 11, 1, 6, 15), true}, {utc(2026, 11, 1, 6, 59), true}, {utc(2026, 11, 1, 7, 0), false}},
			from: utc(2026, 11, 1, 5, 30), next: utc(2026, 11, 1, 7, 0),
		},
		{
			// Friday's window runs into Saturday and belongs to Friday only.
			name: "across midnight", zone: "Europe/Berlin", windows: []string{"fri 22:00-02:00"},
			probes: []probe{{utc(2026, 6, 5, 19, 59), false}, {utc(2026, 6, 5, 20, 0), true},
				{utc(2026, 6, 5, 23, 59), true}, {utc(2026, 6, 6, 0, 0), false}, {utc(2026, 6, 6, 20, 30), false},
				{utc(2026, 6, 4, 21, 0), false}},
			from: utc(2026, 6, 6, 0, 0), next: utc(2026, 6, 12, 20, 0),
		},
		{
			name: "weekday nights", zone: "America/New_York", windows: []string{"mon-fri 18:00-08:00", "sat,sun 20:00-09:00"},
			probes: []probe{{utc(2026, 6, 6, 11, 0), true}, {utc(2026, 6, 6, 12, 30), false}, // Sat 07:00 and 08:30 EDT
				{utc(2026, 6, 8, 12, 30), true}, {utc(2026, 6, 8, 13, 0), false}}, // Mon 08:30 (Sunday's window), 09:00
			from: utc(2026, 6, 6, 12, 30), next: utc(2026, 6, 7, 0, 0), // Sat 20:00 EDT
		},
		{
			name: "always", zone: "Europe/Berlin", windows: []string{"daily 00:00-24:00"},
			probes: []probe{{utc(2026, 3, 28, 23, 0), true}, {utc(2026, 3, 29, 1, 0), true}, {utc(2026, 10, 25, 1, 30), true}},
			from:   utc(2026, 3, 28, 0, 0),
		},
		{
			name: "overlapping windows merge", zone: "UTC", windows: []string{"mon 10:00-12:00", "mon 11:00-13:00"},
			probes: []probe{{utc(2026, 6, 8, 11, 30), true}, {utc(2026, 6, 8, 12, 30), true}, {utc(2026, 6, 8, 13, 0), false}},
			from:   utc(2026, 6, 8, 10, 0), next: utc(2026, 6, 8, 13, 0),
		},
		{
			name: "wrapping day range", zone: "UTC", windows: []string{"fri-mon 10:00-11:00"},
			probes: []probe{{utc(2026, 6, 7, 10, 30), true}, {utc(2026, 6, 8, 10, 30), true}, {utc(2026, 6, 10, 10, 30), false}},
			from:   utc(2026, 6, 8, 11, 0), next: utc(2026, 6, 12, 10, 0),
		},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			s, err := ParseSchedule(c.zone, c.windows)
			require.NoError(t, err)
			for _, p := range c.probes {
				assert.Equal(t, p.armed, s.Armed(p.at), "armed at %s (%s)", p.at, p.at.In(s.Location()))
			}
			next, ok := s.Next(c.from)
			if c.next.IsZero() {
				assert.False(t, ok, "no change expected, got %s", next)
				return
			}
			require.True(t, ok)
			assert.True(t, c.next.Equal(next), "next after %s: want %s, got %s", c.from, c.next, next)
			assert.Equal(t, s.Location(), next.Location())
		})
	}
}

func TestParseScheduleErrors(t *testing.T) {
	cases := []struct {
		zone    string
		windows []string
		want    []string // substrings the error must carry
	}{
		{"Europe/Berlin", []string{"mon-fri 18:00-08:00", "funday 10:00-11:00"}, []string{"window 1", `"funday 10:00-11:00"`, "mon, tue"}},
		{"Europe/Berlin", []string{"mon 25:00-01:00"}, []string{"window 0", "25:00", "24:00"}},
		{"Europe/Berlin", []string{"mon 10:00"}, []string{"window 0", "HH:MM-HH:MM"}},
		{"Europe/Berlin", []string{"mon 10:00-10:00"}, []string{"00:00-24:00"}},
		{"Europe/Berlin", []string{"mon 24:00-01:00"}, []string{"start 24:00"}},
		{"Europe/Berlin", []string{"mon 10:0-11:00"}, []string{"HH:MM"}},
		{"Europe/Berlin", []string{"mon-xyz 10:00-11:00"}, []string{`"xyz"`}},
		{"Europe/Berlin", []string{""}, []string{"window 0", "two parts", "mon-fri 18:00-08:00"}},
		{"Europe/Berlin", nil, []string{"no windows", "daily 00:00-24:00"}},
		{"Mars/Olympus", []string{"daily 00:00-24:00"}, []string{`"Mars/Olympus"`, "IANA"}},
		{"", []string{"daily 00:00-24:00"}, []string{"Europe/Berlin"}},
		{"Local", []string{"daily 00:00-24:00"}, []string{"explicitly"}},
	}
	for _, c := range cases {
		t.Run(c.zone+" "+strings.Join(c.windows, "|"), func(t *testing.T) {
			s, err := ParseSchedule(c.zone, c.windows)
			require.Error(t, err)
			assert.Nil(t, s)
			for _, w := range c.want {
				assert.Contains(t, err.Error(), w)
			}
		})
	}
	_, err := ParseSchedule("UTC", []string{"MON-Fri 8:00-9:30", "  sun,sat   21:00-24:00 "})
	assert.NoError(t, err, "case and extra spaces are accepted")
}

func TestArmStateOverrideExpires(t *testing.T) {
	berlin := mustLoc(t, "Europe/Berlin")
	at := func(h, m int) time.Time { return time.Date(2026, 6, 10, h, m, 0, 0, berlin) }
	s, err := ParseSchedule("Europe/Berlin", []string{"daily 18:00-08:00"})
	require.NoError(t, err)
	st := NewArmState(s)
	st.SetOverride(Override{Armed: false, Until: at(18, 30)}) // "disarm until 18:30"
	cases := []struct {
		now    time.Time
		armed  bool
		reason string
	}{
		{at(17, 0), false, "disarmed by override until 2026-06-10T18:30:00+02:00"},
		{at(18, 15), false, "override"}, // the schedule would arm; the override wins
		{at(18, 30), true, `schedule window 0 "daily 18:00-08:00"`},
		{at(23, 0), true, "schedule"},
	}
	for _, c := range cases {
		armed, reason := st.State(c.now)
		assert.Equal(t, c.armed, armed, "at %s", c.now)
		assert.Contains(t, reason, c.reason, "at %s", c.now)
	}
	st.SetOverride(Override{Armed: true, Until: at(13, 0)})
	armed, reason := st.State(at(12, 0))
	assert.True(t, armed)
	assert.Contains(t, reason, "armed by override")
	armed, reason = st.State(at(13, 0))
	assert.False(t, armed)
	assert.Contains(t, reason, "outside every schedule window")

	armed, _ = NewArmState(nil).State(at(12, 0))
	assert.True(t, armed, "no schedule is always armed")
}

func TestOverrideSaveLoad(t *testing.T) {
	dir := t.TempDir()
	path := filepath.Join(dir, "override.json")
	s, err := ParseSchedule("UTC", []string{"daily 18:00-08:00"})
	require.NoError(t, err)
	until := utc(2026, 6, 10, 18, 30)

	st := NewArmState(s)
	armed, err := st.LoadOverride(path, utc(2026, 6, 10, 12, 0))
	require.NoError(t, err, "a missing file is no override")
	assert.False(t, armed)

	st.SetOverride(Override{Armed: false, Until: until})
	require.NoError(t, st.SaveOverride(path))
	entries, err := os.ReadDir(dir)
	require.NoError(t, err)
	assert.Len(t, entries, 1, "the temp file is renamed away")

	back := NewArmState(s)
	armed, err = back.LoadOverride(path, utc(2026, 6, 10, 18, 0))
	require.NoError(t, err)
	assert.False(t, armed, "the saved disarm holds at 18:00")
	assert.True(t, until.Equal(back.Override().Until))
	armed, _ = back.State(until)
	assert.True(t, armed, "and lapses at 18:30")

	back.ClearOverride()
	require.NoError(t, back.SaveOverride(path))
	armed, err = NewArmState(s).LoadOverride(path, utc(2026, 6, 10, 12, 0))
	require.NoError(t, err)
	assert.False(t, armed, "a cleared override leaves the schedule in charge")
}

func TestOverrideUnreadableFailsArmed(t *testing.T) {
	s, err := ParseSchedule("UTC", []string{"daily 18:00-08:00"})
	require.NoError(t, err)
	noon := utc(2026, 6, 10, 12, 0) // disarmed by the schedule
	cases := map[string]string{
		"garbage":       "{not json",
		"empty":         "",
		"wrong version": `{"v":2,"override":null}`,
		"unknown field": `{"v":1,"override":null,"extra":1}`,
		"no until":      `{"v":1,"override":{"armed":false}}`,
		"trailing":      `{"v":1,"override":null} {}`,
		"directory":     "", // path is a directory: read fails
	}
	for name, content := range cases {
		t.Run(name, func(t *testing.T) {
			path := filepath.Join(t.TempDir(), "override.json")
			if name == "directory" {
				require.NoError(t, os.Mkdir(path, 0o755))
			} else {
				require.NoError(t, os.WriteFile(path, []byte(content), 0o644))
			}
			st := NewArmState(s)
			st.SetOverride(Override{Armed: false, Until: noon.Add(time.Hour)})
			armed, err := st.LoadOverride(path, noon)
			require.ErrorIs(t, err, ErrStateUnreadable)
			assert.True(t, armed)
			assert.Contains(t, err.Error(), "armed for safety")
			armed, reason := st.State(noon)
			assert.True(t, armed, "the state stays armed after loading")
			assert.Contains(t, reason, "unreadable")
			st.SetOverride(Override{Armed: false, Until: noon.Add(time.Minute)})
			armed, _ = st.State(noon)
			assert.False(t, armed, "an operator's new override ends fail-safe arming")
		})
	}
}

func FuzzParseSchedule(f *testing.F) {
	f.Add(uint8(0), "mon-fri 18:00-08:00;sat,sun 20:00-09:00")
	f.Add(uint8(1), "daily 00:00-24:00")
	f.Add(uint8(2), "sun 02:30-03:30")
	f.Add(uint8(1), "sun 02:30-02:45;fri-mon 23:59-00:01")
	f.Add(uint8(0), "tue 24:00-01:00")
	f.Add(uint8(2), "wed,,thu 1:00-2:00")
	f.Add(uint8(0), "mon- 10:00-11:00")
	f.Add(uint8(1), "daily 9:99-10:00")
	zones := []string{"UTC", "Europe/Berlin", "America/New_York"}
	probes := []time.Time{utc(2026, 3, 29, 0, 30), utc(2026, 3, 8, 6, 45), utc(2026, 10, 25, 0, 45), utc(2026, 11, 1, 5, 45)}
	f.Fuzz(func(t *testing.T, zi uint8, text string) {
		s, err := ParseSchedule(zones[int(zi)%len(zones)], strings.Split(text, ";"))
		if err != nil {
			assert.Nil(t, s)
			assert.Contains(t, err.Error(), "schedule")
			return
		}
		for _, p := range probes {
			now := s.Armed(p)
			next, ok := s.Next(p)
			if !ok {
				continue
			}
			require.True(t, next.After(p), "next %s not after %s", next, p)
			require.NotEqual(t, now, s.Armed(next), "state must change at next %s", next)
			require.Equal(t, now, s.Armed(next.Add(-time.Second)), "state changed before next %s", next)
		}
	})
}
