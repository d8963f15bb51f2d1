package main

import (
	"bytes"
	"context"
	"flag"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

var update = flag.Bool("update", false, "rewrite golden files")

// TestCheckGolden runs "stillwater check" on the example configs and on
// broken ones; the output (or the error for a broken file) must match the
// golden file byte for byte. Regenerate with go test -run TestCheckGolden
// -update after a deliberate change, and read the diff.
func TestCheckGolden(t *testing.T) {
	t.Setenv("POOL_CAMERA_PASSWORD", "s3cret-do-not-print")
	t.Setenv("STILLWATER_CONTROL_TOKEN", "s3cret-do-not-print-either")
	tests := []struct {
		config  string
		wantErr bool
		// mention must appear in the message: the key, value or line
		// that is wrong, so the installer can find it.
		mention []string
		// ownDataDir keeps the file's data_dir; the others are checked
		// with -data-dir under testdata, which does not depend on the
		// machine.
		ownDataDir bool
		tz         string // TZ for the system zone
	}{
		{config: "../../deploy/stillwater.example.yaml"},
		{config: "testdata/check/minimal.yaml"},
		{config: "testdata/check/unknown-key.yaml", wantErr: true, mention: []string{"unknown-key.yaml:8:", `"min_area"`, "detect"}},
		{config: "testdata/check/bad-zone.yaml", wantErr: true, mention: []string{"arming.time_zone", "Europe/Berlinn"}},
		{config: "testdata/check/bad-window.yaml", wantErr: true, mention: []string{"arming.schedule", "weekdays"}},
		{config: "testdata/check/three-corners.yaml", wantErr: true, mention: []string{"corners", "3"}},
		{config: "testdata/check/negative-area.yaml", wantErr: true, mention: []string{"min_area_m2", "-0.01"}},
		{config: "testdata/check/missing-env.yaml", wantErr: true, mention: []string{"STILLWATER_TEST_UNSET_PASSWORD", "cameras[0].source"}},
		{config: "testdata/check/bad-duration.yaml", wantErr: true, mention: []string{"bad-duration.yaml:6", "3 seconds"}},
		// What run would trip over, caught beforehand.
		{config: "testdata/check/query-password.yaml", mention: []string{"pwd=xxxxx"}},
		{config: "testdata/check/long-id.yaml", wantErr: true, mention: []string{"cameras[0].id", "64"}},
		{config: "testdata/check/slash-id.yaml", wantErr: true, mention: []string{"cameras[0].id", `"/"`}},
		{config: "testdata/check/local-zone.yaml", tz: "America/New_York", mention: []string{"America/New_York"}},
		{config: "testdata/check/missing-source.yaml", wantErr: true, mention: []string{"cameras[0] (pool).source", "no-such-clip.mp4", "does not exist"}},
		{config: "testdata/check/data-dir-file.yaml", ownDataDir: true, wantErr: true, mention: []string{"data_dir", "not a directory"}},
		{config: "testdata/check/crossed-corners.yaml", mention: []string{"C and D", "crossed"}},
		// Servers named by bus.urls alone: an external bus, no embedded one.
		{config: "testdata/check/bus-urls.yaml", mention: []string{"external NATS", "nats-2.example"}},
	}
	for _, tt := range tests {
		name := strings.TrimSuffix(filepath.Base(tt.config), ".yaml")
		t.Run(name, func(t *testing.T) {
			if tt.tz != "" {
				t.Setenv("TZ", tt.tz)
			}
			args := []string{"check", "-config", tt.config, "-at", "2026-07-01T12:00:00Z"}
			if !tt.ownDataDir {
				args = append(args, "-data-dir", "testdata/check/state")
			}
			var out, errOut bytes.Buffer
			err := run(context.Background(), args, &out, &errOut)
			got := out.String()
			if tt.wantErr {
				require.Error(t, err)
				got = err.Error() + "\n"
			} else {
				require.NoError(t, err, errOut.String())
			}
			for _, m := range tt.mention {
				assert.Contains(t, got, m)
			}
			assert.NotContains(t, got, "s3cret-do-not-print", "a secret reached the output")
			golden := filepath.Join("testdata", "check", name+".golden")
			if *update {
				require.NoError(t, os.WriteFile(golden, []byte(got), 0o644))
			}
			want, err := os.ReadFile(golden)
			require.NoError(t, err, "missing golden file; run with -update")
			assert.Equal(t, string(want), got)
		})
	}
}
