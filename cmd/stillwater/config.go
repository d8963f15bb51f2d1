package main

import (
	"bytes"
	"errors"
	"fmt"
	"io"
	"os"
	"strings"
	"time"

	"gopkg.in/yaml.v3"

	"stillwater/alert"
)

// Config is the daemon's whole configuration, from defaults, the YAML
// file and flags, in that order.
type Config struct {
	DataDir string         `yaml:"data_dir"`
	HTTP    HTTPConfig     `yaml:"http"`
	Log     LogConfig      `yaml:"log"`
	Bus     BusConfig      `yaml:"bus"`
	Cameras []CameraConfig `yaml:"cameras"`
}

// HTTPConfig is the metrics and health listener.
type HTTPConfig struct {
	Listen string `yaml:"listen"`
}

// LogConfig selects the log level and format.
type LogConfig struct {
	Level  string `yaml:"level"`  // debug, info, warn, error
	Format string `yaml:"format"` // text or json
}

// BusConfig selects the message bus: the embedded server when URL is empty.
type BusConfig struct {
	URL    string `yaml:"url"`
	Listen string `yaml:"listen"` // embedded server's client listener
	MQTT   string `yaml:"mqtt"`   // embedded server's MQTT listener; empty is off
	Prefix string `yaml:"subject_prefix"`
}

// CameraConfig is one camera and the pool it sees.
type CameraConfig struct {
	ID        string `yaml:"id"`
	Source    string `yaml:"source"`
	Transport string `yaml:"transport"`
	// Realtime paces a file source at its frame rate, as a live camera would.
	Realtime bool         `yaml:"realtime"`
	Pool     PoolConfig   `yaml:"pool"`
	Corners  [][2]float64 `yaml:"corners"`
	Detect   DetectConfig `yaml:"detect"`
}

// PoolConfig is the pool rectangle in metres.
type PoolConfig struct {
	Length float64 `yaml:"length_m"`
	Width  float64 `yaml:"width_m"`
}

// DetectConfig tunes detection and alarming for one camera.
type DetectConfig struct {
	ProcessWidth int      `yaml:"process_width"`
	Method       string   `yaml:"method"`
	History      int      `yaml:"history"`
	Threshold    float64  `yaml:"threshold"`
	MinArea      float64  `yaml:"min_area_m2"`
	MaxArea      float64  `yaml:"max_area_m2"`
	Persist      Duration `yaml:"persist"`
	UpdateEvery  Duration `yaml:"update_every"`
	ClearAfter   Duration `yaml:"clear_after"`
}

// Duration is a time.Duration written as "700ms" or "2s" in YAML.
type Duration time.Duration

// UnmarshalYAML parses a Go duration string.
func (d *Duration) UnmarshalYAML(n *yaml.Node) error {
	var s string
	if err := n.Decode(&s); err != nil {
		return fmt.Errorf("line %d: want a duration such as 700ms or 2s", n.Line)
	}
	v, err := time.ParseDuration(s)
	if err != nil {
		return fmt.Errorf("line %d: %q is not a duration (write e.g. 700ms or 2s)", n.Line, s)
	}
	*d = Duration(v)
	return nil
}

// MarshalYAML writes the duration as a string.
func (d Duration) MarshalYAML() (any, error) { return time.Duration(d).String(), nil }

// MinChildArea is the default smallest blob, m², that may be a child.
// The WHO Child Growth Standards put a 12-month-old girl's median head
// circumference at 44.9 cm (head diameter about 0.143 m, a top-down disc of
// about 0.016 m²); head and shoulders together seen from above are about
// 0.02–0.06 m² (derived). The default sits below the smallest of these, so
// that a one-year-old's head alone still passes.
const MinChildArea = 0.012

// defaultDetect returns the detection defaults.
func defaultDetect() DetectConfig {
	a := alert.DefaultAlarm()
	return DetectConfig{
		ProcessWidth: 640,
		Method:       "mog2",
		History:      500,
		Threshold:    16,
		MinArea:      MinChildArea,
		MaxArea:      2.5,
		Persist:      Duration(a.Persist),
		UpdateEvery:  Duration(a.UpdateEvery),
		ClearAfter:   Duration(a.ClearAfter),
	}
}

// Defaults returns the configuration before any file is read.
func Defaults() Config {
	return Config{
		DataDir: "/var/lib/stillwater",
		HTTP:    HTTPConfig{Listen: "127.0.0.1:9310"},
		Log:     LogConfig{Level: "info", Format: "text"},
		Bus:     BusConfig{Listen: "127.0.0.1:4222", Prefix: "stillwater"},
	}
}

// LoadConfig reads path over the defaults. Unknown keys are errors.
func LoadConfig(path string) (Config, error) {
	b, err := os.ReadFile(path)
	if err != nil {
		return Config{}, fmt.Errorf("load config: %w", err)
	}
	cfg, err := ParseConfig(b)
	if err != nil {
		return Config{}, fmt.Errorf("load config %s: %w", path, err)
	}
	return cfg, nil
}

// ParseConfig decodes YAML over the defaults and validates the result.
func ParseConfig(b []byte) (Config, error) {
	cfg := Defaults()
	dec := yaml.NewDecoder(bytes.NewReader(b))
	dec.KnownFields(true)
	if err := dec.Decode(&cfg); err != nil && !errors.Is(err, io.EOF) {
		return Config{}, fmt.Errorf("%s", strings.TrimPrefix(err.Error(), "yaml: "))
	}
	for i := range cfg.Cameras {
		cfg.Cameras[i].Detect = mergeDetect(defaultDetect(), cfg.Cameras[i].Detect)
	}
	if err := cfg.Validate(); err != nil {
		return Config{}, err
	}
	return cfg, nil
}

// mergeDetect fills the zero fields of d from def.
func mergeDetect(def, d DetectConfig) DetectConfig {
	if d.ProcessWidth == 0 {
		d.ProcessWidth = def.ProcessWidth
	}
	if d.Method == "" {
		d.Method = def.Method
	}
	if d.History == 0 {
		d.History = def.History
	}
	if d.Threshold == 0 {
		d.Threshold = def.Threshold
	}
	if d.MinArea == 0 {
		d.MinArea = def.MinArea
	}
	if d.MaxArea == 0 {
		d.MaxArea = def.MaxArea
	}
	if d.Persist == 0 {
		d.Persist = def.Persist
	}
	if d.UpdateEvery == 0 {
		d.UpdateEvery = def.UpdateEvery
	}
	if d.ClearAfter == 0 {
		d.ClearAfter = def.ClearAfter
	}
	return d
}

// Validate checks every field and names the first one that is wrong.
func (c Config) Validate() error {
	if c.DataDir == "" {
		return errors.New("data_dir: empty; set a writable directory such as /var/lib/stillwater")
	}
	if c.Bus.URL == "" && c.Bus.Listen == "" {
		return errors.New("bus: neither url nor listen is set; set url for an external server or listen for the embedded one")
	}
	if err := alert.ValidToken(c.Bus.Prefix); err != nil {
		return fmt.Errorf("bus.subject_prefix: %v; use a single word such as stillwater", err)
	}
	switch c.Log.Level {
	case "debug", "info", "warn", "error":
	default:
		return fmt.Errorf("log.level: %q; want debug, info, warn or error", c.Log.Level)
	}
	switch c.Log.Format {
	case "text", "json":
	default:
		return fmt.Errorf("log.format: %q; want text or json", c.Log.Format)
	}
	if len(c.Cameras) == 0 {
		return errors.New("cameras: none configured; add at least one camera with id, source, pool and corners")
	}
	ids := map[string]bool{}
	for i, cam := range c.Cameras {
		where := fmt.Sprintf("cameras[%d]", i)
		if err := alert.ValidToken(cam.ID); err != nil {
			return fmt.Errorf("%s.id: %v; use a short name such as pool or north", where, err)
		}
		if ids[cam.ID] {
			return fmt.Errorf("%s.id: %q is used twice; camera ids must be unique", where, cam.ID)
		}
		ids[cam.ID] = true
		where = fmt.Sprintf("cameras[%d] (%s)", i, cam.ID)
		if cam.Source == "" {
			return fmt.Errorf("%s.source: empty; give an rtsp:// URL or a video file path", where)
		}
		switch cam.Transport {
		case "", "tcp", "udp":
		default:
			return fmt.Errorf("%s.transport: %q; want tcp or udp", where, cam.Transport)
		}
		if cam.Pool.Length <= 0 || cam.Pool.Width <= 0 {
			return fmt.Errorf("%s.pool: length_m %g and width_m %g must both be positive metres", where, cam.Pool.Length, cam.Pool.Width)
		}
		if len(cam.Corners) != 4 {
			return fmt.Errorf("%s.corners: %d given; list the 4 pool corners A, B, C, D in pixels, A at the origin, B along the length", where, len(cam.Corners))
		}
		d := cam.Detect
		switch d.Method {
		case "mog2", "knn":
		default:
			return fmt.Errorf("%s.detect.method: %q; want mog2 or knn", where, d.Method)
		}
		if d.ProcessWidth < 80 {
			return fmt.Errorf("%s.detect.process_width: %d; want at least 80 px (640 is typical)", where, d.ProcessWidth)
		}
		if d.History < 1 {
			return fmt.Errorf("%s.detect.history: %d; want a positive number of frames", where, d.History)
		}
		if d.Threshold < 0 {
			return fmt.Errorf("%s.detect.threshold: %g; want a positive value", where, d.Threshold)
		}
		if d.MinArea < 0 || d.MaxArea <= d.MinArea {
			return fmt.Errorf("%s.detect: min_area_m2 %g and max_area_m2 %g; want 0 ≤ min < max", where, d.MinArea, d.MaxArea)
		}
		if d.Persist < 0 || d.UpdateEvery <= 0 || d.ClearAfter <= 0 {
			return fmt.Errorf("%s.detect: persist, update_every and clear_after must be positive durations", where)
		}
	}
	return nil
}
