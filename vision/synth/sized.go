package synth

import "fmt"

// Sized returns a family scene as another stream of the same camera: the
// same view (the lens intrinsics scaled per axis to the new image size,
// distortion unchanged) at width×height, fps and seconds, encoded with
// codec (h264, mpeg4 or mjpeg) at a quality IP cameras commonly stream at
// and a key frame every second (common practice: cameras send one every
// one to two seconds). A camera's main and sub streams are two such
// scenes of one family scene.
func Sized(s Scene, width, height int, fps, seconds float64, codec string) (Scene, error) {
	if s.World == nil {
		return Scene{}, fmt.Errorf("sized scene: seed %d is not a family scene", s.Seed)
	}
	w := *s.World
	sx, sy := float64(width)/float64(s.Width), float64(height)/float64(s.Height)
	w.Lens.Fx, w.Lens.Cx = w.Lens.Fx*sx, w.Lens.Cx*sx
	w.Lens.Fy, w.Lens.Cy = w.Lens.Fy*sy, w.Lens.Cy*sy
	switch codec {
	case "h264":
		w.Encoding = Encoding{Codec: codec, Quality: 23}
	case "mpeg4", "mjpeg":
		w.Encoding = Encoding{Codec: codec, Quality: 4}
	default:
		return Scene{}, fmt.Errorf("sized scene: codec %q: want h264, mpeg4 or mjpeg", codec)
	}
	w.Encoding.GOP = max(1, int(fps+0.5))
	s.World = &w
	s.Width, s.Height, s.FPS, s.Duration = width, height, fps, seconds
	if err := s.Validate(); err != nil {
		return Scene{}, fmt.Errorf("sized scene: %w", err)
	}
	return s, nil
}
