package main

import (
	"bytes"
	"context"
	"errors"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"stillwater/vision/synth"
)

func TestSynthFamilyCommand(t *testing.T) {
	dir := t.TempDir()
	var out, errOut bytes.Buffer
	err := run(context.Background(), []string{"synth", "-family", "-seed", "2", "-variant", "quiet", "-duration", "1", "-o", dir}, &out, &errOut)
	require.NoError(t, err, errOut.String())
	labels, err := filepath.Glob(filepath.Join(dir, "quiet-2-*.json"))
	require.NoError(t, err)
	require.Len(t, labels, 1, out.String())
	tr, err := synth.ReadTruth(labels[0])
	require.NoError(t, err)
	assert.Equal(t, "quiet", tr.Variant)
	assert.Empty(t, tr.Presence)
	_, err = os.Stat(filepath.Join(dir, tr.Clip))
	require.NoError(t, err, "the clip beside its labels")
	assert.Contains(t, out.String(), tr.Clip)

	out.Reset()
	require.NoError(t, run(context.Background(), []string{"synth", "-family", "-seed", "5", "-count", "2", "-variant", "fault", "-duration", "2", "-sheet", "-o", dir}, &out, &errOut))
	_, err = os.Stat(filepath.Join(dir, "sheet-fault-5-6.png"))
	require.NoError(t, err)

	errOut.Reset()
	err = run(context.Background(), []string{"synth", "-family", "-variant", "flood"}, &out, &errOut)
	assert.True(t, errors.Is(err, errUsage), "%v", err)
	assert.Contains(t, err.Error(), `variant "flood"`)
	// Looking at gate seeds is allowed, with a warning.
	errOut.Reset()
	require.NoError(t, run(context.Background(), []string{"synth", "-family", "-seed", "1000001", "-variant", "quiet", "-duration", "2", "-sheet", "-o", dir}, &out, &errOut))
	assert.True(t, strings.Contains(errOut.String(), "gate range"), errOut.String())
}
