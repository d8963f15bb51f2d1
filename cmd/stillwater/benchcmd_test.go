package main

import (
	"bytes"
	"context"
	"encoding/json"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"stillwater/cmd/stillwater/internal/bench"
	"stillwater/vision/refdata"
)

func TestBenchRefusesBadFlags(t *testing.T) {
	for _, args := range [][]string{
		{"-cameras", "0"},
		{"-duration", "5s", "-warmup", "10s"},
		{"-codec", "vp9"},
		{"-size", "huge"},
		{"-evidence-size", "1x1"},
		{"-opencv-threads", "-1"},
		{"-opencv-threads", "100000"},
	} {
		var out, errOut bytes.Buffer
		err := run(context.Background(), append([]string{"bench"}, args...), &out, &errOut)
		assert.ErrorIs(t, err, errUsage, "%v", args)
	}
}

// TestBenchReports runs the bench briefly on two cameras of a small
// generated clip, each with an evidence stream of another size copied
// without decoding, with the paced yardstick, and checks what it
// reports: the table, and a JSON line whose figures add up. Nothing here
// is a speed target: the figures are printed, not asserted.
func TestBenchReports(t *testing.T) {
	if testing.Short() {
		t.Skip("renders two clips, runs the daemon for 8 s and decodes 12 s of clip in real time")
	}
	var out, errOut bytes.Buffer
	err := run(context.Background(), []string{"bench", "-cameras", "2", "-size", "320x180", "-evidence-size", "480x270", "-fps", "10",
		"-clip-seconds", "12", "-duration", "8s", "-warmup", "3s", "-repeat", "1", "-paced", "-data-dir", t.TempDir()}, &out, &errOut)
	require.NoError(t, err, errOut.String())
	lines := strings.Split(strings.TrimSpace(out.String()), "\n")
	var r bench.Result
	require.NoError(t, json.Unmarshal([]byte(lines[len(lines)-1]), &r), "the last line is JSON")
	table := out.String()
	for _, want := range []string{"2 camera(s), 320x180 at 10 fps", "evidence stream: 480x270", "frame to publish", "CPU", "memory", "same clip alone", "daemon", "pipeline alone", "OpenCV pool of 1 thread(s) (opencv_threads 1)", "decode alone at 10 fps"} {
		assert.Contains(t, table, want)
	}

	require.Len(t, r.PerCamera, 2)
	assert.Equal(t, 1, r.OpenCVThreads, "the daemon's default pool size")
	assert.Equal(t, "480x270", r.EvidenceSize)
	assert.InDelta(t, 5, r.WindowS, 1.5)
	// Frames cannot be searched or dropped beyond those due in the window
	// (one more per camera at its edges).
	assert.Positive(t, r.FramesProcessed)
	assert.LessOrEqual(t, r.FramesProcessed+r.FramesDropped, r.FramesExpected+2*int64(r.Cameras))
	var sum int64
	for _, c := range r.PerCamera {
		sum += c.Processed
	}
	assert.Equal(t, r.FramesProcessed, sum)
	assert.Positive(t, r.CPUSelfS)
	assert.Positive(t, r.CPUChildrenS, "the evidence streams' ffmpeg children are counted")
	assert.InDelta(t, (r.CPUSelfS+r.CPUChildrenS)/r.WindowS, r.Cores, 0.01)
	assert.GreaterOrEqual(t, r.RSSPeakMB, r.RSSFinalMB-1)
	assert.Positive(t, r.PssChildrenMB)
	assert.Positive(t, r.DecodeMsPerFrame)
	assert.Positive(t, r.FFmpegDecodeMsPerFrame)
	assert.Positive(t, r.NaiveMsPerFrame)
	assert.InDelta(t, r.DaemonMsPerFrame/r.DecodeMsPerFrame, r.RatioDecode, 0.01)
	assert.Equal(t, r.LoopFrames, r.PipelineFrames, "the pipeline yardstick searches every frame of the clip the others decode")
	assert.Positive(t, r.PipelineMsPerFrame)
	assert.InDelta(t, r.PipelineMsPerFrame/r.DecodeMsPerFrame, r.RatioPipelineDecode, 0.01)
	assert.InDelta(t, r.PipelineMsPerFrame/r.NaiveMsPerFrame, r.RatioPipelineNaive, 0.01)
	assert.Positive(t, r.PacedDecodeMsPerFrame, "-paced decodes the clip alone at its rate")
	assert.InDelta(t, r.DaemonMsPerFrame/r.PacedDecodeMsPerFrame, r.RatioPacedDecode, 0.01)
	refdata.Report(t, "bench (2 cameras 320x180 10 fps + 480x270 evidence, 5 s window): %.2f cores, p99 frame to publish %.0f ms over %d messages, %.0f MB resident, daemon %.2f× decode alone",
		r.Cores, r.LatencyP99ms, r.LatencySamples, r.RSSFinalMB, r.RatioDecode)
}
