package synth

import (
	"context"
	"fmt"
	"math"
	"path/filepath"
	"sort"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	"gocv.io/x/gocv"

	"stillwater/vision/refdata"
)

// decodeAll reads every frame of a clip with OpenCV, as the daemon would.
func decodeAll(t *testing.T, path string) [][]byte {
	t.Helper()
	vc, err := gocv.VideoCaptureFile(path)
	require.NoError(t, err)
	defer vc.Close()
	m := gocv.NewMat()
	defer m.Close()
	var out [][]byte
	for vc.Read(&m) {
		b, err := m.DataPtrUint8()
		require.NoError(t, err)
		out = append(out, append([]byte(nil), b...))
	}
	return out
}

// TestFaultsRendered encodes scenes with each camera fault through each
// codec, decodes them with OpenCV and checks that the fault is there:
// black frames are black, noise frames are noise, and frozen frames' water
// does not move except where the camera re-encodes the held picture at a
// key frame, while live water always moves.
func TestFaultsRendered(t *testing.T) {
	// A daytime scene with ripples: the first seed that has them.
	var base Scene
	for seed := int64(1); ; seed++ {
		base = FamilyScene(seed, CameraFault)
		if !base.World.Light.Night {
			break
		}
	}
	base.Width, base.Height, base.FPS, base.Duration = 480, 270, 10, 7
	base.World.Lens = drawLens(480, 270, base.Camera.HFOVDeg, 1, 0.5, 0.2, 0, 0, 0, 0, 0)
	base.World.Wind.Slope = 0.05
	const from, to = 3.0, 6.0
	for _, kind := range []string{FaultBlack, FaultFrozen, FaultNoise} {
		codecs := []string{"mjpeg", "mpeg4", "h264"}
		if testing.Short() && kind != FaultFrozen {
			codecs = codecs[:1]
		}
		for _, codec := range codecs {
			t.Run(kind+" "+codec, func(t *testing.T) {
				s := base
				w := *base.World
				s.World = &w
				w.Faults = []Fault{{Kind: kind, From: from, To: to}}
				w.Encoding = Encoding{Codec: codec, Quality: map[string]int{"mjpeg": 4, "mpeg4": 5, "h264": 24}[codec], GOP: 8}
				path := filepath.Join(t.TempDir(), "f"+VideoExt(s))
				truth, err := Render(context.Background(), s, path, "")
				require.NoError(t, err)
				require.Equal(t, []Fault{{kind, from, to}}, truth.Faults)
				frames := decodeAll(t, path)
				require.Len(t, frames, 70)
				water := newWRenderer(s).class
				inFault := func(i int) bool { return float64(i)/s.FPS >= from && float64(i)/s.FPS < to }
				for i := range frames {
					assert.Equal(t, map[bool]string{true: kind, false: ""}[inFault(i)], truth.PerFrame[i].Fault, "frame %d", i)
				}
				// Mean absolute change of the water from the frame before.
				change := func(i int) float64 {
					var sum float64
					n := 0
					for p, c := range water {
						if c != pxWater {
							continue
						}
						for ch := 0; ch < 3; ch++ {
							sum += math.Abs(float64(frames[i][3*p+ch]) - float64(frames[i-1][3*p+ch]))
						}
						n += 3
					}
					return sum / float64(n)
				}
				var live []float64
				for i := 2; i < 30; i++ {
					live = append(live, change(i))
				}
				sort.Float64s(live)
				liveMin := live[0]
				first := int(from * s.FPS)
				last := int(to*s.FPS) - 1
				switch kind {
				case FaultBlack:
					for i := first; i <= last; i++ {
						mean, p99 := levels(frames[i])
						assert.Less(t, mean, 10.0, "frame %d mean", i)
						assert.Less(t, p99, 20.0, "frame %d 99th percentile", i)
					}
				case FaultNoise:
					for i := first + 1; i <= last; i++ {
						_, sd := meanSD(frames[i])
						assert.Greater(t, sd, 40.0, "frame %d spread", i)
						assert.Greater(t, change(i), 30.0, "frame %d changes", i)
					}
				case FaultFrozen:
					var still, keys []float64
					for i := first + 1; i <= last; i++ {
						c := change(i)
						if i%w.Encoding.GOP == 0 {
							keys = append(keys, c)
							assert.Greater(t, c, 0.0, "frame %d: the re-encoded key frame is not bit-identical", i)
						} else {
							still = append(still, c)
						}
					}
					require.NotEmpty(t, keys)
					sort.Float64s(still)
					worstStill := still[len(still)-1]
					refdata.Report(t, "%s: live water changes ≥ %.2f grey levels a frame; frozen %.3f at most between key frames, %v at key frames",
						codec, liveMin, worstStill, fmtList(keys))
					assert.Less(t, worstStill, 0.2*liveMin, "frozen water stands still between key frames")
					for _, k := range keys {
						assert.Greater(t, k, worstStill, "a key frame changes the held picture")
					}
				}
				// Live water moves before and after the fault.
				assert.Greater(t, liveMin, 0.1)
				assert.Greater(t, change(last+3), 0.1, "the water moves again after the fault")
			})
		}
	}
}

func levels(b []byte) (mean, p99 float64) {
	var h [256]int
	var sum float64
	for _, v := range b {
		h[v]++
		sum += float64(v)
	}
	n := 0
	for v, c := range h {
		n += c
		if float64(n) >= 0.99*float64(len(b)) {
			return sum / float64(len(b)), float64(v)
		}
	}
	return sum / float64(len(b)), 255
}

func meanSD(b []byte) (float64, float64) {
	var s, s2 float64
	for _, v := range b {
		s += float64(v)
		s2 += float64(v) * float64(v)
	}
	n := float64(len(b))
	return s / n, math.Sqrt(s2/n - (s/n)*(s/n))
}

func fmtList(v []float64) string {
	out := ""
	for i, x := range v {
		if i > 0 {
			out += ", "
		}
		out += fmt.Sprintf("%.2f", x)
	}
	return out
}
