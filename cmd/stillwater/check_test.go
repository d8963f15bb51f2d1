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
	tests := []struct {
		config  string
		wantErr bool
		// mention must appear in the message: the key, value or line
		// that is wrong, so the installer can find it.
		mention []string
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
	}
	for _, tt := range tests {
		name := strings.TrimSuffix(filepath.Base(tt.config), ".yaml")
		t.Run(name, func(t *testing.T) {
			var out, errOut bytes.Buffer
			err := run(context.Background(), []string{"check", "-config", tt.config, "-at", "2026-07-01T12:00:00Z"}, &out, &errOut)
			got := out.String()
			if tt.wantErr {
				require.Error(t, err)
				got = err.Error() + "\n"
				for _, m := range tt.mention {
					assert.Contains(t, got, m)
				}
			} else {
				require.NoError(t, err, errOut.String())
			}
			assert.NotContains(t, got, "s3cret-do-not-print", "a password reached the output")
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
