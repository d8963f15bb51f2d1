package check

import (
	"fmt"
	"math"

	"stillwater/cmd/stillwater/internal/config"
	"stillwater/cmd/stillwater/internal/pipeline"
	"stillwater/homography"
	"stillwater/vision"
)

// minBodyPixels is the fewest source pixels the smallest body may cover
// at the far end of the water before check warns: about 7 × 7 pixels.
// A judgement, not a measured limit: the detector blurs each frame over
// smooth_m and a camera's codec quantises the picture in 8 × 8 and 16 × 16
// blocks (H.264, MPEG-4 part 2), so a body a few pixels across is smeared
// into the water around it before the detector sees it, while at 7 × 7 it
// still fills most of one block and keeps its own contrast.
const minBodyPixels = 50

// gridReport is what check says about a mean–variance camera's detection
// grid: its size, and how the camera's pixels compare with its cells.
type gridReport struct {
	Cols, Rows int     // cells of the grid, along the pool's length and width
	Water      int     // cells on the water
	Cell, Deck float64 // cell side and the deck margin around the water, m
	// Near and Far are the metres per source pixel at the sharpest and the
	// coarsest water cell (the side of the square of a pixel's footprint
	// on the water surface; along the line of sight a pixel covers more).
	Near, Far float64
	// BodyPixels is how many source pixels a body of config.MinBodyArea
	// covers at the far end.
	BodyPixels float64
	Warnings   []string
}

// detectionGrid builds the grid the daemon would search for cam (at the
// size it decodes, source_px when given) and measures it against the
// calibration; false when cam does not use the mean–variance detector.
func detectionGrid(cam config.CameraConfig) (gridReport, bool, error) {
	if cam.Detect.Method != "meanvar" {
		return gridReport{}, false, nil
	}
	dcam := config.DetectionCamera(cam)
	cal, err := config.NewCalibration(dcam)
	if err != nil {
		return gridReport{}, false, fmt.Errorf("camera %s: %w", cam.ID, err)
	}
	dc, err := pipeline.DetectorConfig(dcam, cal)
	if err != nil {
		return gridReport{}, false, err
	}
	g := dc.Grid
	r := gridReport{Cols: g.Cols, Rows: g.Rows, Cell: g.Cell, Deck: cam.Detect.Deck, Near: math.Inf(1)}
	for i, kind := range g.Water {
		if kind != vision.CellWater {
			continue
		}
		r.Water++
		px := homography.Point{X: float64(g.MapX[i]), Y: float64(g.MapY[i])}
		if px.X < 0 || px.Y < 0 || (g.Src.X > 0 && (px.X >= float64(g.Src.X) || px.Y >= float64(g.Src.Y))) {
			continue // seen by no pixel of the frame
		}
		m := cal.MetresPerPixel(px)
		if math.IsInf(m, 0) || math.IsNaN(m) {
			continue
		}
		r.Near, r.Far = math.Min(r.Near, m), math.Max(r.Far, m)
	}
	if r.Far == 0 {
		return r, true, fmt.Errorf("camera %s: no cell of the water is in the picture", cam.ID)
	}
	r.BodyPixels = config.MinBodyArea / (r.Far * r.Far)
	if r.Cell < r.Far {
		r.Warnings = append(r.Warnings, fmt.Sprintf("cells of %.1f cm are smaller than a pixel at the far end of the water (%.1f cm): the camera cannot resolve them there; raise detect.cell_m to %.3f or more, or search a sharper stream",
			r.Cell*100, r.Far*100, math.Ceil(r.Far*1000)/1000))
	}
	if r.BodyPixels < minBodyPixels {
		r.Warnings = append(r.Warnings, fmt.Sprintf("the smallest body (%g m²) covers %.0f pixels at the far end of the water, fewer than %d: a small child there may be missed; search a sharper stream or move the camera closer",
			config.MinBodyArea, r.BodyPixels, minBodyPixels))
	}
	return r, true, nil
}

// lines are the report as check prints it, one line each.
func (r gridReport) lines() []string {
	out := []string{
		fmt.Sprintf("detection grid: %d × %d cells of %.1f cm over the water and %.2f m of deck around it, %d on the water",
			r.Cols, r.Rows, r.Cell*100, r.Deck, r.Water),
		fmt.Sprintf("pixels on the water: %.2f cm at the near end, %.2f cm at the far end; the smallest body (%g m²) covers %.0f pixels at the far end",
			r.Near*100, r.Far*100, config.MinBodyArea, r.BodyPixels),
	}
	for _, w := range r.Warnings {
		out = append(out, "warning: "+w)
	}
	return out
}
