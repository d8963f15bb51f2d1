package vision

import (
	"bytes"
	"encoding/json"
	"log/slog"
	"path/filepath"
	"strings"
	"sync"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	"gocv.io/x/gocv"
)

type syncBuffer struct {
	mu sync.Mutex
	b  bytes.Buffer
}

func (s *syncBuffer) Write(p []byte) (int, error) {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.b.Write(p)
}

func (s *syncBuffer) String() string {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.b.String()
}

// TestLibraryLogIsForwarded plays a clip with damaged frames (JPEG data
// cut short) while FFmpeg's log is forwarded: FFmpeg's complaints arrive as
// JSON records of the given logger, at error level.
func TestLibraryLogIsForwarded(t *testing.T) {
	frames := readFrames(t, smallClip(t, 0.5))
	defer closeAll(frames)
	out := filepath.Join(t.TempDir(), "damaged.avi")
	a, err := createAVI(out, 320, 240, 10)
	require.NoError(t, err)
	for i, f := range frames {
		b, err := encodeJPEG(f, 80)
		require.NoError(t, err)
		if i%2 == 1 {
			b = b[:len(b)/3]
		}
		require.NoError(t, a.add(b))
	}
	require.NoError(t, a.close())

	var buf syncBuffer
	stop, err := ForwardLibraryLog(slog.New(slog.NewJSONHandler(&buf, nil)))
	require.NoError(t, err)
	cp, err := openCapture(out, capFFmpeg, 1000, 1000)
	require.NoError(t, err)
	m := gocv.NewMat()
	for i := 0; i < len(frames); i++ {
		cp.read(&m)
	}
	m.Close()
	cp.Close()
	stop()

	var recs []map[string]any
	for _, ln := range strings.Split(strings.TrimSpace(buf.String()), "\n") {
		var rec map[string]any
		require.NoError(t, json.Unmarshal([]byte(ln), &rec), "not a JSON record: %q", ln)
		recs = append(recs, rec)
	}
	require.NotEmpty(t, recs, "no FFmpeg message forwarded")
	for _, rec := range recs {
		// OpenCV lets FFmpeg's errors through, nothing below.
		assert.Equal(t, "ERROR", rec["level"], "%v", rec)
		assert.Equal(t, "ffmpeg", rec["library"])
	}
	assert.Contains(t, recs[0]["text"], "[mjpeg @")
	report(t, "library log: %d FFmpeg lines forwarded as JSON, first %q", len(recs), recs[0]["text"])
}
