package bench

import (
	"image"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

func TestParseSize(t *testing.T) {
	for _, tc := range []struct {
		in   string
		want image.Point
		err  bool
	}{
		{"640x360", image.Pt(640, 360), false},
		{"1080p", image.Pt(1920, 1080), false},
		{"720P", image.Pt(1280, 720), false},
		{"1920X1080", image.Pt(1920, 1080), false},
		{"640", image.Point{}, true},
		{"10x10", image.Point{}, true},
		{"axb", image.Point{}, true},
	} {
		got, err := ParseSize(tc.in)
		if tc.err {
			assert.Error(t, err, tc.in)
			continue
		}
		require.NoError(t, err, tc.in)
		assert.Equal(t, tc.want, got, tc.in)
	}
}
