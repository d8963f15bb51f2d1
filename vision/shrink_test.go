package vision

import (
	"fmt"
	"image"
	"testing"

	"gocv.io/x/gocv"
	"stillwater/vision/refdata"
)

// shrinkCase is one image and block size areaShrink is checked on.
type shrinkCase struct {
	name string
	img  func(tb testing.TB) gocv.Mat
	f    int
}

// randomMat is a w × h image of typ with uniformly random pixels.
func randomMat(w, h int, typ gocv.MatType) func(testing.TB) gocv.Mat {
	return func(testing.TB) gocv.Mat {
		m := gocv.NewMatWithSize(h, w, typ)
		gocv.RandU(&m, gocv.NewScalar(0, 0, 0, 0), gocv.NewScalar(256, 256, 256, 256))
		return m
	}
}

// refFrame is the first frame of a video of the reference data, cropped
// to w × h from its top-left corner.
func refFrame(name string, w, h int) func(testing.TB) gocv.Mat {
	return func(tb testing.TB) gocv.Mat {
		tb.Helper()
		p, err := refdata.Path(name)
		if err != nil {
			tb.Fatal(err)
		}
		vc, err := gocv.VideoCaptureFile(p)
		if err != nil {
			tb.Fatal(err)
		}
		defer vc.Close()
		m := gocv.NewMat()
		defer m.Close()
		if !vc.Read(&m) || m.Cols() < w || m.Rows() < h {
			tb.Fatalf("%s: no frame of at least %dx%d", name, w, h)
		}
		crop := m.Region(image.Rect(0, 0, w, h))
		defer crop.Close()
		return crop.Clone()
	}
}

// TestAreaShrinkMatchesOpenCV checks the picture probe's shrink against
// the reference library: OpenCV's resize with INTER_AREA must give the
// same bytes for every whole factor the probe uses (a 16:9 frame of 320 to
// 2560 pixels down to 160), on random pixels and on a real video frame
// (OpenCV's sample vtest.avi, 768 × 576, cropped).
func TestAreaShrinkMatchesOpenCV(t *testing.T) {
	cases := []shrinkCase{
		{"1920x1080 BGR random", randomMat(1920, 1080, gocv.MatTypeCV8UC3), 12},
		{"1280x720 BGR random", randomMat(1280, 720, gocv.MatTypeCV8UC3), 8},
		{"640x360 BGR random", randomMat(640, 360, gocv.MatTypeCV8UC3), 4},
		{"480x270 BGR random", randomMat(480, 270, gocv.MatTypeCV8UC3), 3},
		{"2560x1440 BGR random", randomMat(2560, 1440, gocv.MatTypeCV8UC3), 16},
		{"1920x1080 grey random", randomMat(1920, 1080, gocv.MatTypeCV8UC1), 12},
		{"vtest 720x576 BGR", refFrame("vtest.avi", 720, 576), 9},
		{"vtest 768x576 BGR", refFrame("vtest.avi", 768, 576), 6},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			src := c.img(t)
			defer src.Close()
			want, got := gocv.NewMat(), gocv.NewMat()
			defer want.Close()
			defer got.Close()
			size := image.Pt(src.Cols()/c.f, src.Rows()/c.f)
			gocv.Resize(src, &want, size, 0, 0, gocv.InterpolationArea)
			if err := areaShrink(src, c.f, &got); err != nil {
				t.Fatal(err)
			}
			if got.Cols() != size.X || got.Rows() != size.Y || got.Type() != src.Type() {
				t.Fatalf("got %dx%d type %v, want %dx%d type %v", got.Cols(), got.Rows(), got.Type(), size.X, size.Y, src.Type())
			}
			g, w := got.ToBytes(), want.ToBytes()
			diff := 0
			for i := range g {
				if g[i] != w[i] {
					diff++
				}
			}
			if diff > 0 {
				t.Errorf("%d of %d bytes differ from OpenCV's INTER_AREA resize", diff, len(g))
			}
		})
	}
}

func TestAreaShrinkRejects(t *testing.T) {
	cases := []struct {
		name string
		w, h int
		typ  gocv.MatType
		f    int
	}{
		{"width not a multiple", 1922, 1080, gocv.MatTypeCV8UC3, 12},
		{"height not a multiple", 1920, 1081, gocv.MatTypeCV8UC3, 12},
		{"factor 0", 160, 90, gocv.MatTypeCV8UC3, 0},
		{"factor too large for 16-bit sums", 514, 514, gocv.MatTypeCV8UC1, 257},
		{"not 8-bit", 320, 180, gocv.MatTypeCV32FC1, 2},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			src := gocv.NewMatWithSize(c.h, c.w, c.typ)
			defer src.Close()
			dst := gocv.NewMat()
			defer dst.Close()
			if err := areaShrink(src, c.f, &dst); err == nil {
				t.Fatalf("%dx%d type %v by %d: no error", c.w, c.h, c.typ, c.f)
			}
		})
	}
}

// BenchmarkAreaShrink times the probe's shrink of a 1080p, 720p and 360p
// BGR frame to 160 pixels wide, OpenCV's INTER_AREA resize against
// areaShrink, on one thread of OpenCV's pool.
//
//	go test -run '^$' -bench AreaShrink ./vision/
func BenchmarkAreaShrink(b *testing.B) {
	prev := Threads()
	if err := SetThreads(1); err != nil {
		b.Fatal(err)
	}
	defer SetThreads(prev)
	for _, f := range []int{12, 8, 4} {
		src := randomMat(160*f, 90*f, gocv.MatTypeCV8UC3)(b)
		dst := gocv.NewMat()
		b.Run(fmt.Sprintf("%dx%d/opencv", src.Cols(), src.Rows()), func(b *testing.B) {
			for i := 0; i < b.N; i++ {
				gocv.Resize(src, &dst, image.Pt(160, 90), 0, 0, gocv.InterpolationArea)
			}
		})
		b.Run(fmt.Sprintf("%dx%d/areaShrink", src.Cols(), src.Rows()), func(b *testing.B) {
			for i := 0; i < b.N; i++ {
				if err := areaShrink(src, f, &dst); err != nil {
					b.Fatal(err)
				}
			}
		})
		src.Close()
		dst.Close()
	}
}
