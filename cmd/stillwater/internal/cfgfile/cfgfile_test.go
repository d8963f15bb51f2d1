package cfgfile

import (
	"os"
	"path/filepath"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	"gopkg.in/yaml.v3"
)

const twoCameras = `# top comment
data_dir: /var/lib/stillwater
cameras:
  - id: north   # the deck camera
    source: rtsp://cam1/stream
    pool: {length_m: 8, width_m: 4}
    corners: [[1, 2], [3, 4], [5, 6], [7, 8]]
    reference_points:
      - {pixel: [1, 1], pool_m: [0, 0]}
    zones:
      - {name: ladder, pool_m: [[1, 1], [2, 1], [2, 2]]}
  - {id: south, source: clip.mp4}
`

func mapping(t *testing.T, s string) *yaml.Node {
	t.Helper()
	var n yaml.Node
	require.NoError(t, yaml.Unmarshal([]byte(s), &n))
	return n.Content[0]
}

func TestSetCameraKeys(t *testing.T) {
	set := mapping(t, "pool: {length_m: 10, width_m: 5}\ncorners: [[10, 20], [30, 40], [50, 60], [70, 80]]\nframe_px: [640, 360]\n")
	drop := []string{"pool", "corners", "reference_points", "outline", "frame_px"}
	tests := []struct {
		name, camera string
		check        func(t *testing.T, out map[string]any, text string)
		err          string
	}{
		{"block camera", "north", func(t *testing.T, out map[string]any, text string) {
			cams := out["cameras"].([]any)
			north := cams[0].(map[string]any)
			assert.Equal(t, map[string]any{"length_m": 10, "width_m": 5}, north["pool"])
			assert.Equal(t, []any{[]any{10, 20}, []any{30, 40}, []any{50, 60}, []any{70, 80}}, north["corners"])
			assert.Equal(t, []any{640, 360}, north["frame_px"])
			assert.NotContains(t, north, "reference_points", "a dropped key not set again is gone")
			assert.Contains(t, north, "zones", "other keys stay")
			assert.Equal(t, "rtsp://cam1/stream", north["source"])
			assert.Equal(t, map[string]any{"id": "south", "source": "clip.mp4"}, cams[1], "the other camera is untouched")
			assert.Contains(t, text, "# top comment")
			assert.Contains(t, text, "# the deck camera")
		}, ""},
		{"flow camera", "south", func(t *testing.T, out map[string]any, text string) {
			south := out["cameras"].([]any)[1].(map[string]any)
			assert.Equal(t, []any{640, 360}, south["frame_px"])
			assert.Equal(t, "clip.mp4", south["source"])
		}, ""},
		{"unknown camera", "east", nil, `camera "east": camera not in the configuration file`},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			b, err := SetCameraKeys([]byte(twoCameras), tc.camera, drop, set)
			if tc.err != "" {
				require.Error(t, err)
				assert.Contains(t, err.Error(), tc.err)
				return
			}
			require.NoError(t, err)
			var out map[string]any
			require.NoError(t, yaml.Unmarshal(b, &out))
			tc.check(t, out, string(b))
		})
	}
}

func TestSetCameraKeysRefusesOtherShapes(t *testing.T) {
	set := mapping(t, "frame_px: [1, 2]\n")
	for _, tc := range []struct{ name, src, err string }{
		{"not YAML", "cameras: [", "read configuration"},
		{"a list at the top", "- a\n- b\n", "not a YAML mapping"},
		{"no cameras", "data_dir: x\n", "no cameras list"},
		{"cameras not a list", "cameras: {id: a}\n", "no cameras list"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			_, err := SetCameraKeys([]byte(tc.src), "a", nil, set)
			require.Error(t, err)
			assert.Contains(t, err.Error(), tc.err)
		})
	}
	_, err := SetCameraKeys([]byte(twoCameras), "north", nil, &yaml.Node{Kind: yaml.ScalarNode, Value: "x"})
	assert.ErrorContains(t, err, "not a mapping")
}

func TestReplaceKeepsThePrevious(t *testing.T) {
	dir := t.TempDir()
	p := filepath.Join(dir, "stillwater.yaml")
	require.NoError(t, os.WriteFile(p, []byte("old\n"), 0o640))
	at := time.Date(2026, 12, 2, 16, 5, 9, 0, time.UTC)
	prev, err := Replace(p, []byte("new\n"), at)
	require.NoError(t, err)
	assert.Equal(t, p+".prev-20261202T160509Z", prev)
	b, err := os.ReadFile(p)
	require.NoError(t, err)
	assert.Equal(t, "new\n", string(b))
	b, err = os.ReadFile(prev)
	require.NoError(t, err)
	assert.Equal(t, "old\n", string(b))
	st, err := os.Stat(p)
	require.NoError(t, err)
	assert.Equal(t, os.FileMode(0o640), st.Mode().Perm(), "the mode is kept")
	left, err := filepath.Glob(filepath.Join(dir, ".*new*"))
	require.NoError(t, err)
	assert.Empty(t, left, "no temporary file left")

	// Twice more in the same second: no copy is written over.
	prev2, err := Replace(p, []byte("newer\n"), at)
	require.NoError(t, err)
	prev3, err := Replace(p, []byte("newest\n"), at)
	require.NoError(t, err)
	assert.Equal(t, p+".prev-20261202T160509Z-2", prev2)
	assert.Equal(t, p+".prev-20261202T160509Z-3", prev3)
	for name, want := range map[string]string{prev: "old\n", prev2: "new\n", prev3: "newer\n", p: "newest\n"} {
		b, err := os.ReadFile(name)
		require.NoError(t, err)
		assert.Equal(t, want, string(b), name)
	}

	_, err = Replace(filepath.Join(dir, "missing.yaml"), []byte("x"), at)
	assert.ErrorContains(t, err, "missing.yaml")
}
