package alert

import (
	"bytes"
	"encoding/json"
	"flag"
	"os"
	"path/filepath"
	"sort"
	"testing"
	"time"

	"github.com/santhosh-tekuri/jsonschema/v6"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

var update = flag.Bool("update", false, "rewrite the golden files in testdata/golden")

// exampleMessages returns one fixed message of every kind, with every
// optional field filled so that the goldens cover the whole schema.
func exampleMessages() map[string]any {
	t0 := time.Date(2026, 6, 10, 16, 30, 0, 250_000_000, time.UTC)
	until := time.Date(2026, 6, 10, 18, 30, 0, 0, time.UTC)
	return map[string]any{
		KindTarget: Target{V: Version, Kind: KindTarget, Camera: "north", Track: 7, Seq: 42, Event: "start",
			Time: t0, FrameTime: t0.Add(-120 * time.Millisecond), Frame: 1234,
			Surface: Position{X: 3.25, Y: 1.5}, Floor: FloorPosition{X: 3.1, Y: 1.45, Depth: 1.2},
			Area: 0.18, Velocity: Velocity{X: 0.4, Y: -0.1}, Dwell: 0.8, Confidence: 0.857, Evidence: "north-000042.jpg"},
		KindCleared: Cleared{V: Version, Kind: KindCleared, Camera: "north", Track: 7, Seq: 43,
			Time: t0.Add(5 * time.Second), FrameTime: t0.Add(4900 * time.Millisecond), Frame: 1284,
			Last: Position{X: 4, Y: 2.5}, Duration: 4.5},
		KindFault: NewDriftFault("north", 44, t0, true, 0.35),
		KindArmed: ArmedChange{V: Version, Kind: KindArmed, Camera: "north", Time: t0, Armed: false,
			Reason: "disarmed by override until 2026-06-10T18:30:00Z", Until: &until, By: "http:alice"},
		KindBeat: Heartbeat{V: Version, Kind: KindBeat, Camera: "north", Time: t0, FPS: 9.8,
			CameraOK: true, Armed: true, Version: "0.3.0"},
	}
}

func goldenPath(kind string) string { return filepath.Join("testdata", "golden", kind+".json") }

func TestGoldenMessages(t *testing.T) {
	for kind, m := range exampleMessages() {
		t.Run(kind, func(t *testing.T) {
			got, err := Encode(m)
			require.NoError(t, err)
			if *update {
				require.NoError(t, os.MkdirAll(filepath.Dir(goldenPath(kind)), 0o755))
				require.NoError(t, os.WriteFile(goldenPath(kind), got, 0o644))
			}
			want, err := os.ReadFile(goldenPath(kind))
			require.NoError(t, err, "run go test ./alert -update to create it")
			assert.Equal(t, string(want), string(got), "wire form changed; if on purpose, rerun with -update")
		})
	}
}

func compileSchema(t *testing.T, kind string) *jsonschema.Schema {
	t.Helper()
	raw, err := Schema(kind)
	require.NoError(t, err)
	doc, err := jsonschema.UnmarshalJSON(bytes.NewReader(raw))
	require.NoError(t, err)
	c := jsonschema.NewCompiler()
	c.DefaultDraft(jsonschema.Draft2020)
	c.AssertFormat() // date-time is only an annotation in 2020-12 unless asserted
	url := "urn:stillwater:alert:" + kind + ":v1"
	require.NoError(t, c.AddResource(url, doc))
	s, err := c.Compile(url)
	require.NoError(t, err)
	return s
}

func decodeAny(t *testing.T, b []byte) any {
	t.Helper()
	v, err := jsonschema.UnmarshalJSON(bytes.NewReader(b))
	require.NoError(t, err)
	return v
}

func TestGoldenMessagesMatchSchemas(t *testing.T) {
	for kind := range exampleMessages() {
		t.Run(kind, func(t *testing.T) {
			s := compileSchema(t, kind)
			golden, err := os.ReadFile(goldenPath(kind))
			require.NoError(t, err)
			assert.NoError(t, s.Validate(decodeAny(t, golden)))

			// The schema lists exactly the fields the Go type writes.
			raw, _ := Schema(kind)
			var sch struct {
				Properties map[string]any `json:"properties"`
			}
			require.NoError(t, json.Unmarshal(raw, &sch))
			var msg map[string]any
			require.NoError(t, json.Unmarshal(golden, &msg))
			assert.Equal(t, sortedKeys(sch.Properties), sortedKeys(msg))

			// And the schema rejects broken messages.
			for _, mutate := range []func(map[string]any){
				func(m map[string]any) { delete(m, "time") },
				func(m map[string]any) { m["kind"] = "bogus" },
				func(m map[string]any) { m["v"] = 2 },
				func(m map[string]any) { m["time"] = "yesterday" },
				func(m map[string]any) { m["surprise"] = true },
			} {
				var m map[string]any
				require.NoError(t, json.Unmarshal(golden, &m))
				mutate(m)
				b, err := json.Marshal(m)
				require.NoError(t, err)
				assert.Error(t, s.Validate(decodeAny(t, b)), "accepted %s", b)
			}
		})
	}
}

func TestSchemaRejectsWrongTypes(t *testing.T) {
	cases := map[string]map[string]any{
		KindTarget:  {"confidence": 1.5, "event": "stop", "surface": map[string]any{"x_m": "1"}},
		KindCleared: {"duration_s": -1, "seq": -3},
		KindFault:   {"fault": "camera_sad", "active": "yes", "shift_m": -0.1, "message": ""},
		KindArmed:   {"armed": 1, "until": "soon"},
		KindBeat:    {"fps": "ten", "camera_ok": nil, "camera": "a.b"},
	}
	for kind, bad := range cases {
		s := compileSchema(t, kind)
		golden, err := os.ReadFile(goldenPath(kind))
		require.NoError(t, err)
		for field, v := range bad {
			var m map[string]any
			require.NoError(t, json.Unmarshal(golden, &m))
			m[field] = v
			b, err := json.Marshal(m)
			require.NoError(t, err)
			assert.Error(t, s.Validate(decodeAny(t, b)), "%s accepted %s=%v", kind, field, v)
		}
	}
}

func TestSchemaUnknownKind(t *testing.T) {
	_, err := Schema("gossip")
	require.Error(t, err)
	assert.Contains(t, err.Error(), `"gossip"`)
	assert.Contains(t, err.Error(), KindTarget)
}

func sortedKeys[V any](m map[string]V) []string {
	keys := make([]string, 0, len(m))
	for k := range m {
		keys = append(keys, k)
	}
	sort.Strings(keys)
	return keys
}

// validateMessage checks one produced message against the schema of its
// kind; tests of code that makes messages call it.
func validateMessage(t *testing.T, kind string, m any) {
	t.Helper()
	b, err := Encode(m)
	require.NoError(t, err)
	assert.NoError(t, compileSchema(t, kind).Validate(decodeAny(t, b)), "%s", b)
}

func TestProducedFaultsMatchSchema(t *testing.T) {
	at := time.Date(2026, 12, 2, 1, 0, 0, 0, time.FixedZone("CET", 3600))
	for _, kind := range FaultKinds() {
		for _, active := range []bool{true, false} {
			f := NewFault("north", 3, at, kind, active, "")
			assert.NotEmpty(t, f.Message)
			assert.Equal(t, time.UTC, f.Time.Location())
			validateMessage(t, KindFault, f)
		}
	}
	validateMessage(t, KindFault, NewDriftFault("north", 4, at, true, 0.2))

	// A shift belongs to calibration_drift only.
	s := compileSchema(t, KindFault)
	bad := NewFault("north", 5, at, FaultCameraLost, true, "")
	shift := 0.3
	bad.Shift = &shift
	b, err := Encode(bad)
	require.NoError(t, err)
	assert.Error(t, s.Validate(decodeAny(t, b)))
}

func TestFaultKindsMatchSchemaEnum(t *testing.T) {
	raw, err := Schema(KindFault)
	require.NoError(t, err)
	var sch struct {
		Properties struct {
			Fault struct {
				Enum []string `json:"enum"`
			} `json:"fault"`
		} `json:"properties"`
	}
	require.NoError(t, json.Unmarshal(raw, &sch))
	assert.Equal(t, FaultKinds(), sch.Properties.Fault.Enum)
}
