package main

import (
	"bytes"
	"context"
	"path/filepath"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// TestReplayExplainsFrames replays the floating child clip (entry at 8 s)
// with -why: at the entry frame the child is not reported yet and the
// line says which track or candidate is nearest and what holds it back;
// 5 s later it is reported by a track near the labelled position.
func TestReplayExplainsFrames(t *testing.T) {
	if testing.Short() {
		t.Skip("renders a 14 s clip")
	}
	dir := t.TempDir()
	clip, labels, _ := renderChild(t, dir)
	var out, errOut bytes.Buffer
	err := run(context.Background(), []string{"replay", "-clip", clip, "-labels", labels, "-why", "80,130", "-out", filepath.Join(dir, "r.jsonl")}, &out, &errOut)
	require.NoError(t, err, errOut.String())
	var lines []string
	for _, l := range strings.Split(errOut.String(), "\n") {
		if strings.HasPrefix(l, "frame ") {
			lines = append(lines, l)
		}
	}
	require.Len(t, lines, 2, errOut.String())
	t.Log(lines[0])
	assert.Contains(t, lines[0], "frame 80 (8.00 s): intruder at")
	assert.Contains(t, lines[0], "not reported:")
	assert.Regexp(t, `(track \d+|candidate|learning|no candidate)`, lines[0])
	t.Log(lines[1])
	assert.Regexp(t, `frame 130 \(13\.00 s\): intruder at \([0-9.]+, [0-9.]+\) m reported by track \d+ at`, lines[1])

	// -why needs labels.
	err = run(context.Background(), []string{"replay", "-clip", clip, "-config", filepath.Join("testdata", "check", "minimal.yaml"), "-why", "3"}, &out, &errOut)
	assert.ErrorContains(t, err, "-why needs -labels")
}
