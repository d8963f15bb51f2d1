package watch

import (
	"path/filepath"

	"stillwater/cmd/stillwater/internal/config"
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

// RingDir is where a camera's pre-roll segments are kept.
func RingDir(cfg config.Config, camera string) string {
	d := cfg.Evidence.RingDir
	if d == "" {
		d = filepath.Join(cfg.DataDir, "evidence-ring")
	}
	return filepath.Join(d, camera)
}
