package vision

import (
	"errors"
	"image"
	"io"
	"os"
	"path/filepath"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	"gocv.io/x/gocv"

	"stillwater/vision/refdata"
	"stillwater/vision/synth"
)

// smallClip renders a synthetic scene at 320×240, 10 fps, for seconds.
func smallClip(t testing.TB, seconds float64) string {
	t.Helper()
	s := synth.Default()
	s.Width, s.Height, s.Duration = 320, 240, seconds
	p, _ := cachedClip(t, s)
	return p
}

// countFrames reads a clip back with OpenCV and returns its frame count and
// frame size.
func countFrames(t *testing.T, path string) (int, image.Point) {
	t.Helper()
	vc, err := gocv.VideoCaptureFile(path)
	require.NoError(t, err)
	defer vc.Close()
	m := gocv.NewMat()
	defer m.Close()
	n := 0
	var sz image.Point
	for vc.Read(&m) && !m.Empty() {
		n++
		sz = image.Pt(m.Cols(), m.Rows())
	}
	return n, sz
}

func TestClipHasPreRollAndPostRoll(t *testing.T) {
	src := smallClip(t, 3)
	cam, err := OpenCamera(SourceConfig{URI: src, Loop: true}, DetectorConfig{ProcessWidth: 160})
	require.NoError(t, err)
	defer cam.Close()
	require.NoError(t, cam.EnableEvidence(EvidenceConfig{PreRoll: 2 * time.Second, PostRoll: 3 * time.Second}))
	out := filepath.Join(t.TempDir(), "clip.avi")
	var last time.Duration
	// 4 s of frames fill the 2 s pre-roll; the clip then runs over a loop
	// boundary of the 3 s source.
	for i := 0; i < 40; i++ {
		r, err := cam.Next(nil)
		require.NoError(t, err)
		last = r.Media
	}
	info, err := cam.StartClip(out)
	require.NoError(t, err)
	// 10 fps: frames at media > last − 2 s, that is 20 frames.
	assert.Equal(t, 20, info.PreRoll)
	assert.False(t, info.Extended)
	// 15 more frames, then ask again: the clip is extended to 3 s after
	// frame 55, not restarted.
	for i := 0; i < 15; i++ {
		_, err := cam.Next(nil)
		require.NoError(t, err)
	}
	info2, err := cam.StartClip(filepath.Join(t.TempDir(), "other.avi"))
	require.NoError(t, err)
	assert.True(t, info2.Extended)
	assert.Equal(t, out, info2.Path)
	for cam.Recording() != "" {
		r, err := cam.Next(nil)
		require.NoError(t, err)
		require.Less(t, r.Media, last+time.Minute, "clip never finished")
	}
	// The writer works on its own goroutine: wait for what is queued.
	cam.ev.w.sync()
	// Pre-roll 20 + 15 frames + 30 frames (3 s) after the extension.
	n, sz := countFrames(t, out)
	assert.Equal(t, 20+15+30, n)
	assert.Equal(t, image.Pt(320, 240), sz)
	_, err = os.Stat(filepath.Join(t.TempDir(), "other.avi"))
	assert.True(t, errors.Is(err, os.ErrNotExist))
	report(t, "evidence: clip %d frames (pre-roll %d), media of StartClip %v", n, info.PreRoll, last)
}

// TestCloseFinishesClip: a clip still recording when the camera closes is
// complete and readable, with every frame written so far.
func TestCloseFinishesClip(t *testing.T) {
	src := smallClip(t, 2)
	cam, err := OpenCamera(SourceConfig{URI: src}, DetectorConfig{ProcessWidth: 160})
	require.NoError(t, err)
	require.NoError(t, cam.EnableEvidence(EvidenceConfig{PreRoll: time.Second, PostRoll: time.Minute}))
	for i := 0; i < 12; i++ {
		_, err := cam.Next(nil)
		require.NoError(t, err)
	}
	out := filepath.Join(t.TempDir(), "open.avi")
	info, err := cam.StartClip(out)
	require.NoError(t, err)
	require.Equal(t, 10, info.PreRoll)
	for {
		_, err := cam.Next(nil)
		if errors.Is(err, io.EOF) {
			break
		}
		require.NoError(t, err)
	}
	require.Equal(t, out, cam.Recording())
	require.NoError(t, cam.Close())
	n, _ := countFrames(t, out)
	// 10 pre-roll frames and the remaining 8 of the 20-frame source.
	assert.Equal(t, 18, n)
}

func TestSnapshotDrawsAnnotation(t *testing.T) {
	src := smallClip(t, 0.5)
	cam, err := OpenCamera(SourceConfig{URI: src}, DetectorConfig{})
	require.NoError(t, err)
	defer cam.Close()
	_, err = cam.Next(nil)
	require.NoError(t, err)
	outline := []Point{{40, 200}, {80, 60}, {240, 60}, {280, 200}}
	jpg, err := cam.Snapshot(Annotation{
		Outline: outline,
		Boxes:   []LabeledBox{{Box: image.Rect(120, 100, 160, 150), Label: "track 3 · 2.41 m, 1.07 m"}},
		Caption: "pool · armed · 21:14:03",
	})
	require.NoError(t, err)
	img, err := gocv.IMDecode(jpg, gocv.IMReadColor)
	require.NoError(t, err)
	defer img.Close()
	require.Equal(t, image.Pt(320, 240), image.Pt(img.Cols(), img.Rows()))
	// Midpoint of the bottom edge (40,200)–(280,200), on the 2 px line.
	v := img.GetVecbAt(200, 160)
	// JPEG is lossy: allow 40 levels per channel around amber (B, G, R).
	assert.InDelta(t, float64(outlineColor.B), float64(v[0]), 40, "blue at the outline %v", v)
	assert.InDelta(t, float64(outlineColor.G), float64(v[1]), 40, "green at the outline %v", v)
	assert.InDelta(t, float64(outlineColor.R), float64(v[2]), 40, "red at the outline %v", v)
	// The box's left edge carries the box colour.
	v = img.GetVecbAt(125, 120)
	assert.InDelta(t, float64(boxColor.R), float64(v[2]), 40, "red at the box %v", v)
	assert.Less(t, float64(v[0]), 100.0, "blue at the box %v", v)
}

func TestASCIILabel(t *testing.T) {
	assert.Equal(t, "track 3 - 2.41 m, 1.07 m", asciiLabel("track 3 · 2.41 m, 1.07 m"))
	assert.Equal(t, "0.05 m2 ?", asciiLabel("0.05 m² €"))
}

func TestStartClipNeedsEvidence(t *testing.T) {
	src := smallClip(t, 0.3)
	cam, err := OpenCamera(SourceConfig{URI: src}, DetectorConfig{})
	require.NoError(t, err)
	defer cam.Close()
	_, err = cam.StartClip(filepath.Join(t.TempDir(), "x.avi"))
	assert.ErrorContains(t, err, "EnableEvidence")
}

func TestPruneEvidence(t *testing.T) {
	now := time.Date(2026, 12, 1, 12, 0, 0, 0, time.UTC)
	type f struct {
		name string
		size int
		age  time.Duration
	}
	files := []f{
		{"a.avi", 100, 1 * time.Hour},
		{"b.jpg", 100, 2 * time.Hour},
		{"c.avi", 300, 3 * time.Hour},
		{"d.avi", 100, 4 * time.Hour},
		{"e.avi", 100, 50 * time.Hour},
		{"notes.txt", 100, 90 * time.Hour}, // not evidence: never touched
	}
	tests := []struct {
		name string
		r    Retention
		keep []string
	}{
		{"no limits", Retention{}, []string{"a.avi", "b.jpg", "c.avi", "d.avi", "e.avi"}},
		{"max files", Retention{MaxFiles: 2}, []string{"a.avi", "b.jpg"}},
		// 100+100 fit in 250; c (300) does not, so it and everything older go.
		{"max bytes", Retention{MaxBytes: 250}, []string{"a.avi", "b.jpg"}},
		{"max age", Retention{MaxAge: 48 * time.Hour}, []string{"a.avi", "b.jpg", "c.avi", "d.avi"}},
		{"all limits", Retention{MaxFiles: 4, MaxBytes: 10000, MaxAge: 150 * time.Minute}, []string{"a.avi", "b.jpg"}},
		{"keep the open clip", Retention{MaxFiles: 1, Keep: []string{"e.avi"}}, []string{"e.avi"}},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			dir := t.TempDir()
			for _, x := range files {
				p := filepath.Join(dir, x.name)
				require.NoError(t, os.WriteFile(p, make([]byte, x.size), 0o644))
				require.NoError(t, os.Chtimes(p, now.Add(-x.age), now.Add(-x.age)))
			}
			r := tc.r
			for i, k := range r.Keep {
				r.Keep[i] = filepath.Join(dir, k)
			}
			removed, err := PruneEvidence(dir, r, now)
			require.NoError(t, err)
			var left []string
			entries, err := os.ReadDir(dir)
			require.NoError(t, err)
			for _, e := range entries {
				if e.Name() != "notes.txt" {
					left = append(left, e.Name())
				}
			}
			assert.ElementsMatch(t, tc.keep, left)
			assert.Equal(t, 5-len(tc.keep), removed)
			_, err = os.Stat(filepath.Join(dir, "notes.txt"))
			assert.NoError(t, err)
		})
	}
	_, err := PruneEvidence(filepath.Join(t.TempDir(), "missing"), Retention{}, now)
	assert.ErrorContains(t, err, "missing")
}

// TestEncodeJPEGMatchesOpenCV: the pre-roll's JPEG encoder (libjpeg called
// directly, BGR rows handed over as they are) writes the very bytes
// OpenCV's own imencode writes with the same quality, for colour and grey
// frames of real footage (vtest.avi from Debian's opencv-doc) at three
// qualities; and it refuses what it cannot encode with a message.
func TestEncodeJPEGMatchesOpenCV(t *testing.T) {
	p, err := refdata.Path("vtest.avi")
	require.NoError(t, err)
	frames := readFrames(t, p)
	defer closeAll(frames)
	require.NotEmpty(t, frames)
	bgr := frames[len(frames)/2]
	grey := gocv.NewMat()
	defer grey.Close()
	gocv.CvtColor(bgr, &grey, gocv.ColorBGRToGray)
	// A region of interest: rows that are not contiguous in memory.
	roi := bgr.Region(image.Rect(37, 11, 37+301, 11+203))
	defer roi.Close()
	for name, m := range map[string]gocv.Mat{"bgr": bgr, "grey": grey, "roi": roi} {
		for _, q := range []int{50, 80, 95} {
			got, err := encodeJPEG(m, q)
			require.NoError(t, err, "%s q%d", name, q)
			ref, err := gocv.IMEncodeWithParams(gocv.JPEGFileExt, m, []int{gocv.IMWriteJpegQuality, q})
			require.NoError(t, err)
			want := append([]byte(nil), ref.GetBytes()...)
			ref.Close()
			assert.Equal(t, want, got, "%s at quality %d: bytes differ from OpenCV's imencode", name, q)
			back, err := gocv.IMDecode(got, gocv.IMReadUnchanged)
			require.NoError(t, err)
			assert.Equal(t, m.Cols(), back.Cols())
			assert.Equal(t, m.Rows(), back.Rows())
			assert.Equal(t, m.Channels(), back.Channels())
			back.Close()
		}
	}
	wide := gocv.NewMatWithSize(8, 8, gocv.MatTypeCV16UC3)
	defer wide.Close()
	_, err = encodeJPEG(wide, 80)
	assert.ErrorContains(t, err, "want an 8-bit grey or BGR image")
	empty := gocv.NewMat()
	defer empty.Close()
	_, err = encodeJPEG(empty, 80)
	assert.ErrorContains(t, err, "encode jpeg")
	// Wider than JPEG allows (65 500 px, libjpeg's JPEG_MAX_DIMENSION):
	// libjpeg's own error comes back as an error, not an exit.
	long := gocv.NewMatWithSize(1, 70000, gocv.MatTypeCV8UC1)
	defer long.Close()
	_, err = encodeJPEG(long, 80)
	assert.ErrorContains(t, err, "65500")
	// And the encoder still works after it.
	_, err = encodeJPEG(grey, 80)
	assert.NoError(t, err)
}
