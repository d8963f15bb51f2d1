package main

import (
	"fmt"
	"io"
	"os/exec"
	"path/filepath"
	"time"

	"stillwater/cmd/stillwater/internal/config"
	"stillwater/vision"
)

// Most IP cameras send two streams: the main stream at full resolution and
// a sub stream at 640×360 or so. Decoding the main stream costs more than
// everything else the daemon does, and the detector does not need its
// pixels: a child's head at the far end of a pool spans enough pixels of
// the sub stream. So a camera may decode its sub stream (source) and name
// its main stream as evidence_source, which is copied without decoding
// into the pre-roll and the alarm clips (vision/remux). The calibration is
// made once, on whichever stream frame_px names (stillwater calibrate
// writes the size of the frame it grabbed), and scaled to source_px, the
// size the decoded stream delivers.

// ringDir is where a camera's pre-roll segments are kept.
func ringDir(cfg config.Config, camera string) string {
	d := cfg.Evidence.RingDir
	if d == "" {
		d = filepath.Join(cfg.DataDir, "evidence-ring")
	}
	return filepath.Join(d, camera)
}

// describeStreams prints, for check, what the camera decodes and what it
// copies.
func describeStreams(w io.Writer, cfg config.Config, cam config.CameraConfig) error {
	if sp := cam.SourcePx; sp != ([2]int{}) && sp != cam.Frame {
		cal, err := config.NewCalibration(config.DetectionCamera(cam))
		if err != nil {
			return err
		}
		fmt.Fprintf(w, "    searched at %d×%d px (source_px), the calibration scaled from %d×%d px (frame_px); %s\n",
			sp[0], sp[1], cam.Frame[0], cam.Frame[1], resolution(cal))
	}
	if cam.EvidenceSource == "" {
		return nil
	}
	e := cfg.Evidence
	fmt.Fprintf(w, "    evidence stream %s: copied without decoding (ffmpeg) into a pre-roll ring in %s, segments of about %v; clips %v before to %v after each alarm (.mp4)\n",
		vision.Redact(cam.EvidenceSource), ringDir(cfg, cam.ID), ringSegment, time.Duration(e.PreRoll), time.Duration(e.PostRoll))
	return nil
}

// streamProblems lists what the evidence stream needs of this machine:
// ffmpeg on PATH, a file that is there, a ring directory that can be
// made.
func streamProblems(where string, cfg config.Config, cam config.CameraConfig) []string {
	if cam.EvidenceSource == "" {
		return nil
	}
	var out []string
	if _, err := exec.LookPath("ffmpeg"); err != nil {
		out = append(out, where+".evidence_source: the evidence stream is copied by ffmpeg, which is not on PATH; install it (deploy/setup)")
	}
	if err := checkSource(cam.EvidenceSource); err != nil {
		out = append(out, fmt.Sprintf("%s.evidence_source: %v", where, err))
	}
	if err := checkDataDir(ringDir(cfg, cam.ID)); err != nil {
		out = append(out, "evidence.ring_dir: "+err.Error())
	}
	return out
}
