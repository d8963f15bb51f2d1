package main

// CalibrationConfig is what ties a camera's pixels to the pool: the
// pool's size and the four corner pixels. It is written inline under each
// camera (and printed by stillwater calibrate).
type CalibrationConfig struct {
	Pool    PoolConfig   `yaml:"pool"`
	Corners [][2]float64 `yaml:"corners"`
}

// PoolConfig is the pool rectangle in metres.
type PoolConfig struct {
	Length float64 `yaml:"length_m"`
	Width  float64 `yaml:"width_m"`
}
