package vision

import (
	"context"
	"fmt"
	"image"
	"time"

	"gocv.io/x/gocv"
)

// The loops below are yardsticks for stillwater bench: what decoding a
// clip costs alone, and what a plain motion detector written the way a
// newcomer to OpenCV would write it costs on top. The daemon's own cost
// is stated as a multiple of each.

// DecodeLoop reads up to max frames of a video file (max ≤ 0: all) with
// the FFmpeg backend into BGR frames, as Camera does, and returns how many
// it read.
func DecodeLoop(ctx context.Context, path string, max int) (int, error) {
	return DecodeLoopAt(ctx, path, max, 0)
}

// DecodeLoopAt is DecodeLoop reading frame n no sooner than n/fps after
// the first, as a camera delivers them; fps ≤ 0 reads as fast as it
// decodes. Paced, the decoder works as a camera's does, a frame at a time
// with the machine idle in between, which costs more a frame than a tight
// loop (stillwater bench -paced measures how much).
func DecodeLoopAt(ctx context.Context, path string, max int, fps float64) (int, error) {
	cp, err := openCapture(path, capFFmpeg, 0, 0)
	if err != nil {
		return 0, fmt.Errorf("decode loop %s: %w", path, err)
	}
	defer cp.Close()
	m := gocv.NewMat()
	defer m.Close()
	n := 0
	start := time.Now()
	for (max <= 0 || n < max) && ctx.Err() == nil {
		if fps > 0 {
			if wait := time.Until(start.Add(time.Duration(float64(n) / fps * float64(time.Second)))); wait > 0 {
				time.Sleep(wait)
			}
		}
		ok, err := cp.read(&m)
		if err != nil {
			return n, fmt.Errorf("decode loop %s: frame %d: %w", path, n, err)
		}
		if !ok || m.Empty() {
			break
		}
		n++
	}
	return n, nil
}

// NaiveLoop reads up to max frames of a video file (max ≤ 0: all) and
// runs a plain motion detector over each: scaled to 640 px wide, grey,
// OpenCV's MOG2 with its defaults, shadows cut at 200, a 3×3 opening,
// outer contours, and contours of at least minArea pixels counted. It
// returns the frames read and the blobs found.
func NaiveLoop(ctx context.Context, path string, max int, minArea float64) (frames, blobs int, err error) {
	cp, err := openCapture(path, capFFmpeg, 0, 0)
	if err != nil {
		return 0, 0, fmt.Errorf("naive loop %s: %w", path, err)
	}
	defer cp.Close()
	mog := gocv.NewBackgroundSubtractorMOG2()
	defer mog.Close()
	kernel := gocv.GetStructuringElement(gocv.MorphRect, image.Pt(3, 3))
	defer kernel.Close()
	frame, small, grey, fg := gocv.NewMat(), gocv.NewMat(), gocv.NewMat(), gocv.NewMat()
	defer frame.Close()
	defer small.Close()
	defer grey.Close()
	defer fg.Close()
	for (max <= 0 || frames < max) && ctx.Err() == nil {
		ok, err := cp.read(&frame)
		if err != nil {
			return frames, blobs, fmt.Errorf("naive loop %s: frame %d: %w", path, frames, err)
		}
		if !ok || frame.Empty() {
			break
		}
		frames++
		src := frame
		if frame.Cols() > 640 {
			h := frame.Rows() * 640 / frame.Cols()
			gocv.Resize(frame, &small, image.Pt(640, h), 0, 0, gocv.InterpolationArea)
			src = small
		}
		gocv.CvtColor(src, &grey, gocv.ColorBGRToGray)
		mog.Apply(grey, &fg)
		gocv.Threshold(fg, &fg, 200, 255, gocv.ThresholdBinary)
		gocv.MorphologyEx(fg, &fg, gocv.MorphOpen, kernel)
		contours := gocv.FindContours(fg, gocv.RetrievalExternal, gocv.ChainApproxSimple)
		for i := 0; i < contours.Size(); i++ {
			if gocv.ContourArea(contours.At(i)) >= minArea {
				blobs++
			}
		}
		contours.Close()
	}
	return frames, blobs, nil
}

// MediaInfo is what a video file says about itself.
type MediaInfo struct {
	Size   image.Point // px
	FPS    float64     // 0 when it does not say
	Frames int         // frames it declares, 0 when it does not say
}

// ProbeClip opens a video file with the FFmpeg backend and reads its
// first frame for the frame size.
func ProbeClip(path string) (MediaInfo, error) {
	cp, err := openCapture(path, capFFmpeg, 0, 0)
	if err != nil {
		return MediaInfo{}, fmt.Errorf("probe %s: %w", path, err)
	}
	defer cp.Close()
	m := gocv.NewMat()
	defer m.Close()
	ok, err := cp.read(&m)
	if err == nil && (!ok || m.Empty()) {
		err = fmt.Errorf("no first frame")
	}
	if err != nil {
		return MediaInfo{}, fmt.Errorf("probe %s: %w", path, err)
	}
	info := MediaInfo{Size: image.Pt(m.Cols(), m.Rows())}
	if f := cp.get(capPropFPS); f > 0 && f < 240 {
		info.FPS = f
	}
	if n := cp.get(capPropFrameCount); n > 0 && n < 1e9 {
		info.Frames = int(n)
	}
	return info, nil
}
