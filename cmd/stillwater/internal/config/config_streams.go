package config

import (
	"errors"
	"fmt"
	"math"
	"path/filepath"
	"strings"

	"stillwater/homography"
)

// DetectionCamera returns cam with its calibration in the pixels of the
// frames it decodes: when source_px is set and differs from frame_px,
// every pixel of the calibration and the zones is scaled from frame_px to
// source_px, per axis (a sub stream may squeeze the picture, as 704×576
// does with a 16:9 view), and so are the lens intrinsics; a lens given as
// a field of view is turned into intrinsics first when the axes scale
// differently. Distortion coefficients act on normalised coordinates and
// do not change. reference_frame is left as it is: it is compared with
// the decoded frames and must be a frame of source.
func DetectionCamera(cam CameraConfig) CameraConfig {
	from, to := cam.Frame, cam.SourcePx
	if to == ([2]int{}) || from == ([2]int{}) || from == to {
		return cam
	}
	sx, sy := float64(to[0])/float64(from[0]), float64(to[1])/float64(from[1])
	px := func(p [2]float64) [2]float64 { return [2]float64{p[0] * sx, p[1] * sy} }
	pxs := func(ps [][2]float64) [][2]float64 {
		if ps == nil {
			return nil
		}
		out := make([][2]float64, len(ps))
		for i, p := range ps {
			out[i] = px(p)
		}
		return out
	}
	out := cam
	out.Frame = to
	out.Corners = pxs(cam.Corners)
	out.Outline = pxs(cam.Outline)
	if cam.Reference != nil {
		out.Reference = make([]ReferencePoint, len(cam.Reference))
		for i, r := range cam.Reference {
			out.Reference[i] = ReferencePoint{Pixel: px(r.Pixel), Pool: r.Pool}
		}
	}
	if cam.Zones != nil {
		out.Zones = make([]ZoneConfig, len(cam.Zones))
		for i, z := range cam.Zones {
			out.Zones[i] = ZoneConfig{Name: z.Name, PoolM: z.PoolM, Pixels: pxs(z.Pixels)}
		}
	}
	if l := cam.Lens; l != nil {
		nl := *l
		nl.Dist = append([]float64(nil), l.Dist...)
		if nl.Fx == 0 && nl.HFOVDeg > 0 && math.Abs(sx/sy-1) > 1e-9 {
			if k, err := homography.IntrinsicsFromFOV(nl.HFOVDeg, from[0], from[1]); err == nil {
				nl.Fx, nl.Fy, nl.Cx, nl.Cy, nl.HFOVDeg = k.Fx, k.Fy, k.Cx, k.Cy, 0
			}
		}
		if nl.Fx != 0 {
			nl.Fx, nl.Cx = nl.Fx*sx, nl.Cx*sx
			nl.Fy, nl.Cy = nl.Fy*sy, nl.Cy*sy
		}
		out.Lens = &nl
	}
	return out
}

// validateStreams checks a camera's evidence_source and source_px; where
// names the camera.
func validateStreams(where string, cam CameraConfig, ev EvidenceConfig) error {
	if e := cam.EvidenceSource; e != "" {
		if !ev.On() {
			return fmt.Errorf("%s.evidence_source: evidence is off (evidence.enabled: false); remove the key or turn evidence on", where)
		}
		if err := streamURI(e); err != nil {
			return fmt.Errorf("%s.evidence_source: %v", where, err)
		}
	}
	sp := cam.SourcePx
	if sp == ([2]int{}) {
		return nil
	}
	switch {
	case sp[0] <= 0 || sp[1] <= 0:
		return fmt.Errorf("%s.source_px: [%d, %d]; give the width and height in pixels of the frames source delivers, such as [640, 360]", where, sp[0], sp[1])
	case cam.Frame == ([2]int{}):
		return fmt.Errorf("%s.source_px: the calibration is scaled from frame_px to source_px; set frame_px to the size of the frame the corners were clicked on", where)
	}
	return nil
}

// streamURI checks that s names an RTSP or HTTP stream or a file.
func streamURI(s string) error {
	scheme, _, ok := strings.Cut(s, "://")
	if !ok {
		if filepath.Ext(s) == "" {
			return fmt.Errorf("%q is neither an rtsp:// URL nor a video file", s)
		}
		return nil
	}
	switch scheme {
	case "rtsp", "rtsps", "http", "https":
		return nil
	}
	return errors.New("want an rtsp:// (or rtsps://, http://, https://) URL of the camera's main stream, or a video file")
}
