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
	Control ControlConfig  `yaml:"control"`
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

// CameraConfig is one camera and the pool it sees.
type CameraConfig struct {
	ID        string `yaml:"id"`
	Source    string `yaml:"source"`
	Transport string `yaml:"transport"`
	// Realtime paces a file source at its frame rate, as a live camera would.
	Realtime bool `yaml:"realtime"`
	// Calibration is inline: pool, corners, lens and water keys sit
	// directly under the camera.
	CalibrationConfig `yaml:",inline"`
	Detect            DetectConfig `yaml:"detect"`
	// Zones are exclusion polygons (fountain, ladder, cleaner's dock).
	Zones []ZoneConfig `yaml:"zones"`
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

// Validate checks every field and names the first one that is wrong.
func (c Config) Validate() error {
	if c.DataDir == "" {
		return errors.New("data_dir: empty; set a writable directory such as /var/lib/stillwater")
	}
	if err := validateBus(c.Bus); err != nil {
		return err
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
		if err := validateDetect(where, cam.Detect); err != nil {
			return err
		}
	}
	return nil
}
