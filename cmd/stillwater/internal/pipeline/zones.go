package pipeline

import (
	"fmt"

	"stillwater/cmd/stillwater/internal/config"
	"stillwater/homography"
)

// zone is one validated exclusion polygon in its own frame.
type zone struct {
	name   string
	pixels bool // outline in source pixels; else pool metres
	pts    [][2]float64
}

// zoneSet is a camera's exclusion zones.
type zoneSet []zone

// newZoneSet validates cam's zones against its calibration and returns
// them.
func newZoneSet(cam config.CameraConfig, cal *homography.Calibration) (zoneSet, error) {
	if err := config.ValidateZones("camera "+cam.ID, cam, cal); err != nil {
		return nil, err
	}
	var zs zoneSet
	for i, z := range cam.Zones {
		name := z.Name
		if name == "" {
			name = fmt.Sprintf("zone%d", i)
		}
		if len(z.Pixels) > 0 {
			zs = append(zs, zone{name: name, pixels: true, pts: z.Pixels})
		} else {
			zs = append(zs, zone{name: name, pts: z.PoolM})
		}
	}
	return zs, nil
}

// excluded returns the zone containing a blob centre, given in source
// pixels and in pool metres.
func (zs zoneSet) excluded(px, pool homography.Point) (string, bool) {
	for _, z := range zs {
		p := pool
		if z.pixels {
			p = px
		}
		if insidePolygon(z.pts, p.X, p.Y) {
			return z.name, true
		}
	}
	return "", false
}

// insidePolygon is the even-odd ray-crossing test.
func insidePolygon(pts [][2]float64, x, y float64) bool {
	in := false
	for i, j := 0, len(pts)-1; i < len(pts); j, i = i, i+1 {
		xi, yi, xj, yj := pts[i][0], pts[i][1], pts[j][0], pts[j][1]
		if (yi > y) != (yj > y) && x < (xj-xi)*(y-yi)/(yj-yi)+xi {
			in = !in
		}
	}
	return in
}
