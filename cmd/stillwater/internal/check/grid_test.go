package check

import (
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"stillwater/cmd/stillwater/internal/config"
)

// squareOnCamera looks straight down on an 8 × 4 m pool whose corners
// span w × w/2 pixels of a frame with a 50 px border, so that every pixel
// covers 8/w m of the water everywhere.
func squareOnCamera(w float64, cell float64) config.CameraConfig {
	cam := config.CameraConfig{
		ID: "north", Source: "pool.mp4",
		CalibrationConfig: config.CalibrationConfig{
			Pool:    config.PoolConfig{Length: 8, Width: 4},
			Corners: [][2]float64{{50, 50}, {50 + w, 50}, {50 + w, 50 + w/2}, {50, 50 + w/2}},
			Frame:   [2]int{int(w) + 100, int(w/2) + 100},
		},
		Detect: config.DefaultDetect(),
	}
	if cell > 0 {
		cam.Detect.Cell = cell
	}
	return cam
}

func TestDetectionGrid(t *testing.T) {
	const cellWarning, bodyWarning = "cannot resolve them", "may be missed"
	perspective := squareOnCamera(800, 0)
	// The far side (C, D) is drawn a quarter as long as the near one (A, B).
	perspective.Corners = [][2]float64{{50, 400}, {850, 400}, {550, 100}, {350, 100}}
	perspective.Frame = [2]int{900, 450}
	mog2 := squareOnCamera(800, 0)
	mog2.Detect.Method = "mog2"

	tests := []struct {
		name        string
		cam         config.CameraConfig
		near, far   float64 // m per pixel; 0: not checked
		bodyPixels  float64 // 0: not checked
		cell, body  bool    // warnings expected
		cols, rows  int     // 0: not checked
		waterCells  int     // 0: not checked
		farOverNear float64 // at least; 0: not checked
	}{
		// 8 m over 800 px: 1 cm a pixel, a 0.03 m² body covers
		// 0.03 / 0.01² = 300 pixels. Grid: (8 + 2 × 0.6) / 0.025 = 368 by
		// (4 + 1.2) / 0.025 = 208 cells, 320 × 160 of them on the water.
		{name: "square on, 1 cm a pixel", cam: squareOnCamera(800, 0), near: 0.01, far: 0.01, bodyPixels: 300, cols: 368, rows: 208, waterCells: 320 * 160},
		// 8 m over 400 px: 2 cm a pixel, under the 2.5 cm cell; 75 pixels.
		{name: "square on, 2 cm a pixel", cam: squareOnCamera(400, 0), near: 0.02, far: 0.02, bodyPixels: 75},
		// 8 m over 200 px: 4 cm a pixel, coarser than a cell; 18.75 pixels.
		{name: "square on, 4 cm a pixel", cam: squareOnCamera(200, 0), near: 0.04, far: 0.04, bodyPixels: 18.75, cell: true, body: true},
		// 8 m over 250 px: 3.2 cm a pixel, finer than 5 cm cells, but
		// the body covers 0.03 / 0.032² = 29.3 pixels.
		{name: "5 cm cells, 3.2 cm a pixel", cam: squareOnCamera(250, 0.05), near: 0.032, far: 0.032, bodyPixels: 29.296875, body: true},
		// 1.5 cm cells under 2 cm pixels; the body covers 75 pixels.
		{name: "1.5 cm cells, 2 cm a pixel", cam: squareOnCamera(400, 0.015), near: 0.02, far: 0.02, bodyPixels: 75, cell: true},
		// Seen obliquely, the far end is coarser than the near one: here
		// 800 px for 8 m at the near side and 200 px at the far side,
		// where both warnings are due.
		{name: "perspective", cam: perspective, farOverNear: 4, cell: true, body: true},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			cfg := config.Defaults()
			cfg.DataDir = t.TempDir()
			tt.cam.FrameTimeout = config.Duration(config.DefaultFrameTimeout)
			cfg.Cameras = []config.CameraConfig{tt.cam}
			require.NoError(t, cfg.Validate())
			g, ok, err := detectionGrid(tt.cam)
			require.NoError(t, err)
			require.True(t, ok)
			if tt.near > 0 {
				assert.InDelta(t, tt.near, g.Near, tt.near*1e-6, "near")
				assert.InDelta(t, tt.far, g.Far, tt.far*1e-6, "far")
			}
			if tt.bodyPixels > 0 {
				assert.InDelta(t, tt.bodyPixels, g.BodyPixels, tt.bodyPixels*1e-5, "body pixels")
			}
			if tt.cols > 0 {
				assert.Equal(t, tt.cols, g.Cols, "cols")
				assert.Equal(t, tt.rows, g.Rows, "rows")
			}
			if tt.waterCells > 0 {
				assert.Equal(t, tt.waterCells, g.Water, "water cells")
			}
			if tt.farOverNear > 0 {
				assert.GreaterOrEqual(t, g.Far/g.Near, tt.farOverNear, "far %.4f over near %.4f m/px", g.Far, g.Near)
			}
			text := strings.Join(g.lines(), "\n")
			assert.Equal(t, tt.cell, strings.Contains(text, cellWarning), "cell warning in\n%s", text)
			assert.Equal(t, tt.body, strings.Contains(text, bodyWarning), "body warning in\n%s", text)
			assert.Contains(t, text, "detection grid: ")
		})
	}
	t.Run("mog2 has no grid", func(t *testing.T) {
		_, ok, err := detectionGrid(mog2)
		require.NoError(t, err)
		assert.False(t, ok)
	})
}
