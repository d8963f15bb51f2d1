package config

import (
	"bytes"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	"gopkg.in/yaml.v3"
)

func TestZoneYAML(t *testing.T) {
	src := []byte("- name: ladder\n  pool_m: [[7, 1], [8.2, 1], [8.2, 2], [7, 2]]\n- pixels: [[120, 120], [160, 120], [160, 160]]\n")
	var zs []ZoneConfig
	dec := yaml.NewDecoder(bytes.NewReader(src))
	dec.KnownFields(true)
	require.NoError(t, dec.Decode(&zs))
	require.Len(t, zs, 2)
	assert.Equal(t, "ladder", zs[0].Name)
	assert.Equal(t, [2]float64{8.2, 2}, zs[0].PoolM[2])
	assert.Equal(t, [2]float64{160, 160}, zs[1].Pixels[2])
	bad := yaml.NewDecoder(bytes.NewReader([]byte("- name: x\n  polygon: [[1, 1]]\n")))
	bad.KnownFields(true)
	assert.ErrorContains(t, bad.Decode(&zs), "field polygon not found")
}

func TestSegments(t *testing.T) {
	// Hand-worked: the diagonals of the unit square cross at (0.5, 0.5);
	// two parallel sides never meet; a T touching at an end point meets.
	assert.True(t, segmentsMeet([2]float64{0, 0}, [2]float64{1, 1}, [2]float64{0, 1}, [2]float64{1, 0}))
	assert.False(t, segmentsMeet([2]float64{0, 0}, [2]float64{1, 0}, [2]float64{0, 1}, [2]float64{1, 1}))
	assert.True(t, segmentsMeet([2]float64{0, 0}, [2]float64{2, 0}, [2]float64{1, 0}, [2]float64{1, 1}))
}
