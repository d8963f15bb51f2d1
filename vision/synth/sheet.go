package synth

import (
	"context"
	"fmt"
	"image"
	"image/color"
	"math"
	"path/filepath"
	"strings"

	"gocv.io/x/gocv"
)

// WriteSheet writes a contact sheet PNG to path: one row per family scene,
// one column per fraction of its duration, each tile tileW pixels wide.
// Each tile shows the raw frame (before encoding) with the labelled pool
// corners (green) and the labelled child position (red: in the water,
// yellow: out of it) drawn from the labels, and a caption.
func WriteSheet(ctx context.Context, path string, scenes []Scene, fracs []float64, tileW int) error {
	if len(scenes) == 0 || len(fracs) == 0 || tileW < 64 {
		return fmt.Errorf("contact sheet %s: want scenes, times and a tile width of at least 64 px", path)
	}
	// OpenCV aborts the process on an extension it cannot write.
	if ext := strings.ToLower(filepath.Ext(path)); ext != ".png" && ext != ".jpg" && ext != ".jpeg" {
		return fmt.Errorf("contact sheet %q: want a .png or .jpg file name", path)
	}
	tileH := tileW * 9 / 16
	sheet := gocv.NewMatWithSize(tileH*len(scenes), tileW*len(fracs), gocv.MatTypeCV8UC3)
	defer sheet.Close()
	for row, s := range scenes {
		if s.World == nil {
			return fmt.Errorf("contact sheet: scene %d is not a family scene", row)
		}
		if err := s.Validate(); err != nil {
			return fmt.Errorf("contact sheet: scene %d: %w", row, err)
		}
		r := newWRenderer(s)
		truth := r.labels("")
		n := s.frameCount()
		// Frames are drawn in order, about two a second, so auto exposure
		// runs nearly as in the clip.
		step := max(1, int(s.FPS/2))
		next := 0
		for col, f := range fracs {
			want := int(math.Min(float64(n-1), math.Max(0, math.Round(f*float64(n-1)))))
			var ft FrameTruth
			for next <= want {
				if err := ctx.Err(); err != nil {
					return err
				}
				k := min(next, want)
				var err error
				if ft, err = r.frame(k); err != nil {
					return fmt.Errorf("contact sheet: scene %d frame %d: %w", row, k, err)
				}
				if k == want {
					next = want + 1
				} else {
					next += step
				}
			}
			if err := r.drawTile(&sheet, truth, ft, image.Rect(col*tileW, row*tileH, (col+1)*tileW, (row+1)*tileH)); err != nil {
				return err
			}
		}
	}
	if !gocv.IMWrite(path, sheet) {
		return fmt.Errorf("contact sheet: cannot write %s", path)
	}
	return nil
}

// drawTile puts the current frame with its label marks into dst at box.
func (r *wRenderer) drawTile(dst *gocv.Mat, truth Truth, ft FrameTruth, box image.Rectangle) error {
	m, err := gocv.NewMatFromBytes(r.H, r.W, gocv.MatTypeCV8UC3, r.out)
	if err != nil {
		return fmt.Errorf("contact sheet: %w", err)
	}
	defer m.Close()
	frame := m.Clone()
	defer frame.Close()
	green := color.RGBA{0, 255, 0, 0}
	k := max(1, r.W/400) // marks stay visible when the tile is shrunk
	for _, c := range truth.Corners {
		gocv.Circle(&frame, image.Pt(int(math.Round(c.Pixel[0])), int(math.Round(c.Pixel[1]))), 4*k, green, k)
	}
	mark := func(o *Occupation, c color.RGBA) {
		if o == nil {
			return
		}
		if u, v, ok := r.cam.project(o.X, o.Y, 0); ok {
			p := image.Pt(int(math.Round(u)), int(math.Round(v)))
			gocv.Circle(&frame, p, 9*k, c, k)
		}
	}
	mark(ft.Intruder, color.RGBA{255, 0, 0, 0})
	mark(ft.Outside, color.RGBA{255, 255, 0, 0})
	// Fit the frame into the tile, keeping its aspect.
	sc := math.Min(float64(box.Dx())/float64(r.W), float64(box.Dy())/float64(r.H))
	sz := image.Pt(int(float64(r.W)*sc), int(float64(r.H)*sc))
	small := gocv.NewMat()
	defer small.Close()
	gocv.Resize(frame, &small, sz, 0, 0, gocv.InterpolationArea)
	roi := dst.Region(image.Rect(box.Min.X, box.Min.Y, box.Min.X+sz.X, box.Min.Y+sz.Y))
	small.CopyTo(&roi)
	roi.Close()
	caption := fmt.Sprintf("%s %d t=%.1fs %dx%d", r.w.Variant, r.s.Seed, ft.T, r.W, r.H)
	if ft.Fault != "" {
		caption += " " + ft.Fault
	}
	if ft.Intruder != nil {
		caption += fmt.Sprintf(" child (%.2f, %.2f)", ft.Intruder.X, ft.Intruder.Y)
	}
	org := image.Pt(box.Min.X+4, box.Min.Y+14)
	gocv.PutText(dst, caption, org, gocv.FontHersheySimplex, 0.4, color.RGBA{0, 0, 0, 0}, 3)
	gocv.PutText(dst, caption, org, gocv.FontHersheySimplex, 0.4, color.RGBA{255, 255, 255, 0}, 1)
	return nil
}
