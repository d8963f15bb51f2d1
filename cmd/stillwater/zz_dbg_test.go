package main

import (
	"context"
	"io"
	"log/slog"
	"os"
	"testing"

	"stillwater/vision/synth"
)

func TestZZDbgStill(t *testing.T) {
	s, _ := scenarioByName("still-child", 7)
	s.Width, s.Height = 320, 240
	s.Duration = 40
	truth, err := synth.Render(context.Background(), s, "/tmp/still_s100.avi", "")
	if err != nil {
		t.Fatal(err)
	}
	cam, _ := cameraFromLabels(truth, "/tmp/still_s100.avi")
	f, _ := os.Create("/tmp/still_s100.jsonl")
	defer f.Close()
	replayClip(context.Background(), cam, "stillwater", f, slog.New(slog.NewTextHandler(io.Discard, nil)))
}
