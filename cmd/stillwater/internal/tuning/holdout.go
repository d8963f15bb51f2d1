package tuning

import (
	"encoding/json"
	"fmt"
	"math"
	"os"
	"time"

	"stillwater/cmd/stillwater/internal/config"
	"stillwater/vision/synth"
)

// holdoutFormat names the label format of independently rendered pool
// clips: per-frame labels in pool metres, the camera as an installer
// would know it (corners clicked on the raw frame, chessboard intrinsics,
// measured position) and the generator's own truth, which is only for
// checking a calibration.
const holdoutFormat = "pool-holdout-v1"

// holdoutLabels is the part of a pool-holdout-v1 label file stillwater
// reads. Pool metres have their origin at corner C0, x along C0→C1, y along
// C0→C3, the same frame as stillwater's corners A, B, C, D.
type holdoutLabels struct {
	Format   string `json:"format"`
	Name     string `json:"name"`
	Expected struct {
		Intruder    bool   `json:"intruder"`
		CameraFault bool   `json:"camera_fault"`
		Note        string `json:"note"`
	} `json:"expected"`
	Video struct {
		File   string  `json:"file"`
		FPS    float64 `json:"fps"`
		Frames int     `json:"frame_count"`
		Width  int     `json:"width"`
		Height int     `json:"height"`
	} `json:"video"`
	Pool struct {
		Length  float64 `json:"length_m"`
		Width   float64 `json:"width_m"`
		Corners []struct {
			Name     string     `json:"name"`
			Pool     [2]float64 `json:"pool_m"`
			Rendered [2]float64 `json:"image_px_rendered"`
		} `json:"corners"`
		Depth struct {
			AtX0 float64 `json:"at_x0"`
			AtXL float64 `json:"at_xL"`
		} `json:"depth_m"`
	} `json:"pool"`
	Camera struct {
		Position []float64   `json:"position_m"`
		K        [][]float64 `json:"K"`
		Dist     []float64   `json:"dist_coeffs"`
	} `json:"camera"`
	// Homography is the generator's truth; used only to check a
	// calibration built from the fields above.
	Homography struct {
		ImageToPool [][]float64 `json:"image_to_pool_m"`
		AppliesTo   string      `json:"applies_to"`
	} `json:"homography"`
	Intruders []struct {
		ID       string            `json:"id"`
		Kind     string            `json:"kind"`
		Presence []holdoutInterval `json:"presence_intervals"`
	} `json:"intruders"`
	Faults []struct {
		Type      string            `json:"type"`
		Intervals []holdoutInterval `json:"intervals"`
	} `json:"faults"`
	PerFrame struct {
		T     []float64     `json:"t_s"`
		Child [][]float64   `json:"child_centre_m"` // null rows when absent
		InW   []interface{} `json:"child_in_water"`
		Pose  []*string     `json:"child_pose"` // "up", "flat"; null when absent
	} `json:"per_frame"`
}

// poseAt returns the child's labelled pose at a frame, "-" when none.
func (h holdoutLabels) poseAt(frame int) string {
	if frame < 0 || frame >= len(h.PerFrame.Pose) || h.PerFrame.Pose[frame] == nil {
		return "-"
	}
	return *h.PerFrame.Pose[frame]
}

// holdoutInterval is a run of frames; EndFrame is inclusive.
type holdoutInterval struct {
	StartFrame int     `json:"start_frame"`
	EndFrame   int     `json:"end_frame"`
	Start      float64 `json:"start_s"`
	End        float64 `json:"end_s"`
}

// readHoldout loads a pool-holdout-v1 label file and checks what the
// calibration and scoring need.
func readHoldout(path string) (holdoutLabels, error) {
	b, err := os.ReadFile(path)
	if err != nil {
		return holdoutLabels{}, fmt.Errorf("read labels: %w", err)
	}
	var h holdoutLabels
	if err := json.Unmarshal(b, &h); err != nil {
		return holdoutLabels{}, fmt.Errorf("read labels %s: %w", path, err)
	}
	if h.Format != holdoutFormat {
		return holdoutLabels{}, fmt.Errorf("read labels %s: format %q, want %q", path, h.Format, holdoutFormat)
	}
	switch {
	case h.Video.FPS <= 0:
		return h, fmt.Errorf("read labels %s: video.fps %g must be positive", path, h.Video.FPS)
	case h.Video.Frames <= 0:
		return h, fmt.Errorf("read labels %s: video.frame_count %d must be positive", path, h.Video.Frames)
	case len(h.Pool.Corners) != 4:
		return h, fmt.Errorf("read labels %s: pool.corners has %d entries, want C0–C3", path, len(h.Pool.Corners))
	case len(h.Camera.K) != 3 || len(h.Camera.K[0]) != 3 || len(h.Camera.K[1]) != 3:
		return h, fmt.Errorf("read labels %s: camera.K is not a 3×3 matrix", path)
	case len(h.Camera.Position) != 3:
		return h, fmt.Errorf("read labels %s: camera.position_m has %d values, want x, y, z", path, len(h.Camera.Position))
	case len(h.PerFrame.Child) != 0 && len(h.PerFrame.Child) != h.Video.Frames:
		return h, fmt.Errorf("read labels %s: per_frame.child_centre_m has %d frames, video has %d", path, len(h.PerFrame.Child), h.Video.Frames)
	}
	return h, nil
}

// camera builds the camera an installer would configure for the clip:
// the four corners as clicked on the raw frame, the chessboard lens, the
// measured camera position and the depth profile. The generator's truth
// homographies are not used.
func (h holdoutLabels) camera(clip string) config.CameraConfig {
	cam := config.CameraConfig{
		ID: "clip", Source: clip,
		CalibrationConfig: config.CalibrationConfig{
			Pool:  config.PoolConfig{Length: h.Pool.Length, Width: h.Pool.Width},
			Frame: [2]int{h.Video.Width, h.Video.Height},
			Lens: &config.LensConfig{
				Fx: h.Camera.K[0][0], Fy: h.Camera.K[1][1], Cx: h.Camera.K[0][2], Cy: h.Camera.K[1][2],
				Dist: append([]float64(nil), h.Camera.Dist...),
			},
			CameraPosition: &config.CameraPositionConfig{X: h.Camera.Position[0], Y: h.Camera.Position[1], Height: h.Camera.Position[2]},
			Water:          config.WaterConfig{Shallow: h.Pool.Depth.AtX0, Deep: h.Pool.Depth.AtXL},
		},
		Detect: config.DefaultDetect(),
	}
	for _, c := range h.Pool.Corners {
		cam.Corners = append(cam.Corners, c.Rendered)
	}
	return cam
}

// truth converts the labels to the project's label form, which the
// scoring reads: the presence intervals (end frame inclusive, so the
// interval ends one frame later) and the child's labelled centre on every
// frame it is drawn.
func (h holdoutLabels) truth() synth.Truth {
	t := synth.Truth{
		Format: synth.LabelFormat, Clip: h.Video.File, FPS: h.Video.FPS,
		Width: h.Video.Width, Height: h.Video.Height, Frames: h.Video.Frames,
		Pool: synth.PoolSize{Length: h.Pool.Length, Width: h.Pool.Width},
	}
	for i, c := range h.Pool.Corners {
		t.Corners = append(t.Corners, synth.Corner{Name: string(rune('A' + i)), Pool: c.Pool, Pixel: c.Rendered})
	}
	for _, in := range h.Intruders {
		for _, p := range in.Presence {
			t.Presence = append(t.Presence, synth.Presence{
				From: float64(p.StartFrame) / h.Video.FPS,
				To:   float64(p.EndFrame+1) / h.Video.FPS,
			})
		}
	}
	t.PerFrame = make([]synth.FrameTruth, h.Video.Frames)
	for i := range t.PerFrame {
		ft := synth.FrameTruth{Frame: i, T: float64(i) / h.Video.FPS}
		if i < len(h.PerFrame.Child) && len(h.PerFrame.Child[i]) == 2 {
			ft.Intruder = &synth.Occupation{X: h.PerFrame.Child[i][0], Y: h.PerFrame.Child[i][1]}
		}
		t.PerFrame[i] = ft
	}
	return t
}

// holdoutRules are the scoring rules of the independent scenes: as the
// project's, except that a still child counts as kept while one track
// reports it with no silence longer than 2 s.
func holdoutRules() scoreRules {
	r := DefaultScoreRules()
	r.MaxGap = 2 * time.Second
	return r
}

// ReadLabels loads a label file in either format the project scores:
// stillwater.labels/v1 or pool-holdout-v1 (converted).
func ReadLabels(path string) (synth.Truth, error) {
	format, err := labelFormat(path)
	if err != nil {
		return synth.Truth{}, err
	}
	if format == holdoutFormat {
		h, err := readHoldout(path)
		if err != nil {
			return synth.Truth{}, err
		}
		return h.truth(), nil
	}
	return synth.ReadTruth(path)
}

// labelFormat returns a label file's "format" field.
func labelFormat(path string) (string, error) {
	b, err := os.ReadFile(path)
	if err != nil {
		return "", fmt.Errorf("read labels: %w", err)
	}
	var f struct {
		Format string `json:"format"`
	}
	if err := json.Unmarshal(b, &f); err != nil {
		return "", fmt.Errorf("read labels %s: %w", path, err)
	}
	return f.Format, nil
}

// CameraForLabels builds the camera for replaying clip from a label file
// of either format: the corners alone for stillwater.labels/v1, the
// installer's full calibration for pool-holdout-v1.
func CameraForLabels(path, clip string) (config.CameraConfig, error) {
	format, err := labelFormat(path)
	if err != nil {
		return config.CameraConfig{}, err
	}
	if format == holdoutFormat {
		h, err := readHoldout(path)
		if err != nil {
			return config.CameraConfig{}, err
		}
		return h.camera(clip), nil
	}
	t, err := synth.ReadTruth(path)
	if err != nil {
		return config.CameraConfig{}, err
	}
	return CameraFromLabels(t, clip)
}

// holdoutH returns the generator's truth homography from undistorted
// pixels to pool metres, for checking a calibration.
func (h holdoutLabels) holdoutH() ([9]float64, bool) {
	var m [9]float64
	if len(h.Homography.ImageToPool) != 3 {
		return m, false
	}
	for i, row := range h.Homography.ImageToPool {
		if len(row) != 3 {
			return m, false
		}
		for j, v := range row {
			m[3*i+j] = v
		}
	}
	return m, !math.IsNaN(m[8])
}
