package synth

import (
	"context"
	"fmt"
	"image"
)

// StageClip renders, once into the render cache (CacheDir), the clip the
// stage benchmarks time: the family scene stillwater bench plays, seed 34
// (daylight, a child in the water from about 6 s), at size, 15 fps
// H.264, 9 s long. It returns the clip's path and labels.
func StageClip(ctx context.Context, size image.Point) (string, Truth, error) {
	s, err := Sized(FamilyScene(34, Intruder), size.X, size.Y, 15, 9, "h264")
	if err != nil {
		return "", Truth{}, fmt.Errorf("stage clip %dx%d: %w", size.X, size.Y, err)
	}
	dir, err := CacheDir()
	if err != nil {
		return "", Truth{}, err
	}
	video, _, truth, err := Cached(ctx, s, dir)
	if err != nil {
		return "", Truth{}, fmt.Errorf("stage clip %dx%d: %w", size.X, size.Y, err)
	}
	return video, truth, nil
}
