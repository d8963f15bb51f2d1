package homography

import (
	"errors"
	"fmt"
	"math"
)

// Grid is a rectification of the pool plane: a raster of square cells of
// side Cell metres, CellsX across (along pool x) and CellsY down (along
// pool y), whose top-left cell corner is at Origin in pool metres. For each
// cell centre, MapX and MapY hold the frame pixel (as recorded, lens
// distortion included; origin top-left) that sees it, row by row; a cell
// no pixel of the frame sees holds -1 in both. The maps are the form
// OpenCV's remap takes (float32, one value per destination pixel).
type Grid struct {
	CellsX, CellsY int
	Cell           float64
	Origin         Point
	MapX, MapY     []float32
}

// Errors NewGrid returns.
var (
	ErrGridEmpty    = errors.New("rectification grid has no cells")
	ErrGridTooLarge = errors.New("rectification grid too large")
)

// MaxGridCells bounds a grid's size: a 12 × 6 m pool with a margin at
// 2.5 cm is about 140 000 cells.
const MaxGridCells = 600_000

// NewGrid rasterises the rectangle of pool metres from lo to hi at cell
// metres per cell. toPixel maps a point of the plane (pool metres) to the
// frame pixel that sees it, false where none does; frame is the frame's
// size in pixels, and cells whose pixel falls outside it are marked -1
// (with a size of zero, only cells at negative pixels are).
func NewGrid(lo, hi Point, cell float64, frameW, frameH int, toPixel func(Point) (Point, bool)) (Grid, error) {
	if !(cell > 0) || math.IsInf(cell, 0) {
		return Grid{}, fmt.Errorf("new grid: cell size %v m: want a positive size", cell)
	}
	nx := int(math.Ceil((hi.X - lo.X) / cell))
	ny := int(math.Ceil((hi.Y - lo.Y) / cell))
	if nx <= 0 || ny <= 0 {
		return Grid{}, fmt.Errorf("new grid: %v to %v m at %v m: %w", lo, hi, cell, ErrGridEmpty)
	}
	if nx*ny > MaxGridCells {
		return Grid{}, fmt.Errorf("new grid: %d×%d cells at %v m: %w (at most %d); use larger cells", nx, ny, cell, ErrGridTooLarge, MaxGridCells)
	}
	g := Grid{CellsX: nx, CellsY: ny, Cell: cell, Origin: lo, MapX: make([]float32, nx*ny), MapY: make([]float32, nx*ny)}
	for j := 0; j < ny; j++ {
		for i := 0; i < nx; i++ {
			k := j*nx + i
			g.MapX[k], g.MapY[k] = -1, -1
			p, ok := toPixel(g.Centre(i, j))
			if !ok || !(p.X >= 0 && p.Y >= 0) || (frameW > 0 && p.X > float64(frameW-1)) || (frameH > 0 && p.Y > float64(frameH-1)) {
				continue
			}
			g.MapX[k], g.MapY[k] = float32(p.X), float32(p.Y)
		}
	}
	return g, nil
}

// Centre returns the pool-metre position of the centre of cell (i, j).
func (g Grid) Centre(i, j int) Point {
	return Point{X: g.Origin.X + (float64(i)+0.5)*g.Cell, Y: g.Origin.Y + (float64(j)+0.5)*g.Cell}
}

// ToPlane maps a position in cell units (x across, y down, where the
// centre of cell (i, j) is (i+0.5, j+0.5)) to pool metres.
func (g Grid) ToPlane(x, y float64) Point {
	return Point{X: g.Origin.X + x*g.Cell, Y: g.Origin.Y + y*g.Cell}
}

// ToCells maps pool metres to cell units, the inverse of ToPlane.
func (g Grid) ToCells(p Point) (x, y float64) {
	return (p.X - g.Origin.X) / g.Cell, (p.Y - g.Origin.Y) / g.Cell
}

// Seen returns the share of cells some frame pixel sees.
func (g Grid) Seen() float64 {
	if len(g.MapX) == 0 {
		return 0
	}
	n := 0
	for _, v := range g.MapX {
		if v >= 0 {
			n++
		}
	}
	return float64(n) / float64(len(g.MapX))
}
