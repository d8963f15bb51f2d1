// Package config decodes and validates the daemon's configuration file:
// cameras and their calibration keys, detection settings, zones, the bus,
// arming and HTTP. Every error names the key (and line) at fault.
package config

import (
	"bytes"
	"errors"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"regexp"
	"runtime"
	"strconv"
	"strings"
	"time"
	"unicode"
	"unicode/utf8"

	"gopkg.in/yaml.v3"

	"stillwater/alert"
	"stillwater/alert/arming"
	"stillwater/alert/bus"
	"stillwater/cmd/stillwater/internal/redact"
	"stillwater/vision"
)

// Config is the daemon's whole configuration, from defaults, the YAML
// file and flags, in that order.
type Config struct {
	DataDir string        `yaml:"data_dir"`
	HTTP    HTTPConfig    `yaml:"http"`
	Log     LogConfig     `yaml:"log"`
	Bus     BusConfig     `yaml:"bus"`
	Control ControlConfig `yaml:"control"`
	Arming  ArmingConfig  `yaml:"arming"`
	// HeartbeatEvery is how often each camera publishes a heartbeat.
	HeartbeatEvery Duration       `yaml:"heartbeat_every"`
	Evidence       EvidenceConfig `yaml:"evidence"`
	// OpenCVThreads sizes OpenCV's worker pool, which every camera shares:
	// 1 (the default) keeps each camera's image operations on its own
	// goroutine; 0 is OpenCV's default, one thread per CPU. Applied once
	// at start-up (ApplyOpenCVThreads).
	OpenCVThreads int            `yaml:"opencv_threads"`
	Cameras       []CameraConfig `yaml:"cameras"`

	// secrets are the values that came from ${NAME}, *_env, *_file or an
	// inline secret, collected while loading so that logs, errors and
	// check's output can hide them wherever they turn up.
	secrets []string
}

// ArmingConfig is the default weekly schedule for every camera. A window
// reads "mon-fri 18:00-08:00" or "sat,sun 20:00-07:30" (a window may cross
// midnight) in the named IANA time zone. No windows means armed around
// the clock.
type ArmingConfig struct {
	TimeZone string   `yaml:"time_zone"`
	Schedule []string `yaml:"schedule"`
}

// EvidenceConfig says what is kept for each alarm: an annotated JPEG and a
// clip with pre-roll, under data_dir/evidence, pruned oldest first.
type EvidenceConfig struct {
	Enabled  *bool    `yaml:"enabled"` // default true
	PreRoll  Duration `yaml:"pre_roll"`
	PostRoll Duration `yaml:"post_roll"`
	MaxFiles int      `yaml:"max_files"`
	MaxMB    int64    `yaml:"max_mb"`
	MaxAge   Duration `yaml:"max_age"`
	// RingDir holds the pre-roll of the cameras with an evidence_source
	// (data_dir/evidence-ring when empty); a tmpfs spares an SD card.
	RingDir string `yaml:"ring_dir"`
}

// On reports whether evidence is kept.
func (e EvidenceConfig) On() bool { return e.Enabled == nil || *e.Enabled }

// HTTPConfig is the metrics, health, control and picture listener. The
// viewer secret is a bearer token for the camera pictures
// (/cameras/ID/latest.jpg), apart from the control token, which opens
// them too; on a listener that is not loopback, pictures need one of the
// two.
type HTTPConfig struct {
	Listen           string `yaml:"listen"`
	ViewerSecret     string `yaml:"viewer_secret"`
	ViewerSecretEnv  string `yaml:"viewer_secret_env"`
	ViewerSecretFile string `yaml:"viewer_secret_file"`
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
	// Loop plays a file source again from the start when it ends.
	Loop bool `yaml:"loop"`
	// Deblock decodes source with the codec's deblocking filter, as a
	// player does; by default it is skipped (see vision.SourceConfig).
	Deblock bool `yaml:"deblock"`
	// FrameTimeout is how long without a frame, while armed, before the
	// camera is reported lost.
	FrameTimeout Duration `yaml:"frame_timeout"`
	// EvidenceSource is the camera's main stream, when Source is its low-
	// resolution sub stream: its packets are copied, never decoded, into
	// the pre-roll and the alarm clips (see streams.go).
	EvidenceSource string `yaml:"evidence_source"`
	// SourcePx is the frame size Source delivers when the calibration's
	// pixels (frame_px) are another stream's, such as the main stream's:
	// the calibration is scaled to it.
	SourcePx [2]int `yaml:"source_px"`
	// Schedule replaces arming.schedule for this camera when set.
	Schedule []string `yaml:"schedule"`
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
		Arming:  ArmingConfig{TimeZone: "Local"},

		HeartbeatEvery: Duration(10 * time.Second),
		OpenCVThreads:  DefaultOpenCVThreads,
		Evidence: EvidenceConfig{
			PreRoll: Duration(5 * time.Second), PostRoll: Duration(10 * time.Second),
			MaxFiles: 200, MaxMB: 2048, MaxAge: Duration(30 * 24 * time.Hour),
		},
	}
}

// LoadConfig reads path over the defaults. Unknown keys are errors.
func LoadConfig(path string) (Config, error) {
	b, err := os.ReadFile(path)
	if err != nil {
		return Config{}, fmt.Errorf("load config: %w", err)
	}
	cfg, err := ParseConfig(b)
	var le *lineError
	switch {
	case errors.As(err, &le):
		return Config{}, fmt.Errorf("%s:%d: %s", path, le.line, le.msg)
	case err != nil:
		return Config{}, fmt.Errorf("%s: %w", path, err)
	}
	return cfg, nil
}

var envRef = regexp.MustCompile(`\$\{([A-Za-z_][A-Za-z0-9_]*)\}`)

// expandEnv replaces each ${NAME} in s; an unset variable is an error.
// The values put in are added to *used, to be hidden in logs and output.
func expandEnv(s string, env func(string) (string, bool), used *[]string) (string, error) {
	var missing []string
	out := envRef.ReplaceAllStringFunc(s, func(ref string) string {
		name := envRef.FindStringSubmatch(ref)[1]
		v, ok := env(name)
		if !ok {
			missing = append(missing, name)
		}
		*used = append(*used, v)
		return v
	})
	if len(missing) > 0 {
		return "", fmt.Errorf("environment variable %s is not set; export it (for systemd: an EnvironmentFile) or write the value", strings.Join(missing, ", "))
	}
	return out, nil
}

// lineError is a decoding problem at a line of the YAML text.
type lineError struct {
	line int
	msg  string
}

func (e *lineError) Error() string { return fmt.Sprintf("line %d: %s", e.line, e.msg) }

var (
	yamlLine    = regexp.MustCompile(`^line (\d+): (.*)$`)
	yamlUnknown = regexp.MustCompile(`^field (\S+) not found in type config\.(\w+)$`)
	yamlType    = regexp.MustCompile("^cannot unmarshal !!\\w+ `(.*)` into (bool|int|float64)$")
)

// typeWants says what a setting of a Go type must be, as an installer
// reads it.
var typeWants = map[string]string{"bool": "true or false", "int": "a whole number", "float64": "a number"}

// yamlError rewrites the decoder's message into one naming the line and,
// for an unknown key, the section it was found in; for a value of the
// wrong type, what the key takes.
func yamlError(err error) error {
	var te *yaml.TypeError
	msg := strings.TrimPrefix(err.Error(), "yaml: ")
	if errors.As(err, &te) && len(te.Errors) > 0 {
		msg = te.Errors[0]
	}
	m := yamlLine.FindStringSubmatch(msg)
	if m == nil {
		return errors.New(msg)
	}
	line, _ := strconv.Atoi(m[1])
	text := m[2]
	if u := yamlUnknown.FindStringSubmatch(text); u != nil {
		text = fmt.Sprintf("unknown key %q in %s; check its spelling and indentation against deploy/stillwater.example.yaml", u[1], sectionName(u[2]))
	}
	if t := yamlType.FindStringSubmatch(text); t != nil {
		text = fmt.Sprintf("%q is not %s, which the key on this line takes", t[1], typeWants[t[2]])
	}
	return &lineError{line: line, msg: text}
}

// sectionName names a config type as the installer sees it.
func sectionName(typ string) string {
	switch typ {
	case "Config":
		return "the top level"
	case "CameraConfig":
		return "a camera"
	case "CalibrationConfig":
		return "a camera's calibration"
	case "DetectConfig":
		return "a camera's detect section"
	case "LensConfig":
		return "a camera's lens section"
	case "WaterConfig":
		return "a camera's water section"
	case "DriftConfig":
		return "a camera's drift section"
	case "CameraPositionConfig":
		return "a camera's camera_position"
	case "ReferencePoint":
		return "a reference point"
	case "ZoneConfig":
		return "a zone"
	case "OutboxSection":
		return "the bus.outbox section"
	case "StreamSection":
		return "the bus.stream section"
	case "BusAuthConfig":
		return "the bus.auth section"
	case "BusTLSConfig":
		return "the bus.tls section"
	case "BusUserConfig":
		return "a bus user"
	case "LeafConfig":
		return "a bus leaf remote"
	}
	s := strings.TrimSuffix(typ, "Config")
	return "the " + strings.ToLower(s) + " section"
}

// ParseConfig decodes YAML over the defaults and validates the result.
// ${NAME} in a camera source or the bus URL is replaced from the process
// environment.
func ParseConfig(b []byte) (Config, error) {
	return ParseConfigEnv(b, os.LookupEnv)
}

// ParseConfigEnv is ParseConfig with env looking up the ${NAME}
// references and *_env secrets.
func ParseConfigEnv(b []byte, env func(string) (string, bool)) (Config, error) {
	cfg := Defaults()
	dec := yaml.NewDecoder(bytes.NewReader(b))
	dec.KnownFields(true)
	if err := dec.Decode(&cfg); err != nil && !errors.Is(err, io.EOF) {
		return Config{}, yamlError(err)
	}
	var err error
	if cfg.Bus.URL, err = expandEnv(cfg.Bus.URL, env, &cfg.secrets); err != nil {
		return Config{}, fmt.Errorf("bus.url: %w", err)
	}
	for i := range cfg.Cameras {
		if cfg.Cameras[i].Source, err = expandEnv(cfg.Cameras[i].Source, env, &cfg.secrets); err != nil {
			return Config{}, fmt.Errorf("cameras[%d].source: %w", i, err)
		}
		if cfg.Cameras[i].EvidenceSource, err = expandEnv(cfg.Cameras[i].EvidenceSource, env, &cfg.secrets); err != nil {
			return Config{}, fmt.Errorf("cameras[%d].evidence_source: %w", i, err)
		}
		cfg.Cameras[i].Detect = MergeDetect(DefaultDetect(), cfg.Cameras[i].Detect)
		if cfg.Cameras[i].FrameTimeout == 0 {
			cfg.Cameras[i].FrameTimeout = Duration(DefaultFrameTimeout)
		}
	}
	cfg.secrets = append(cfg.secrets, cfg.secretValues(func(k string) string { v, _ := env(k); return v })...)
	if err := cfg.Validate(); err != nil {
		return Config{}, redact.New(cfg.secrets...).Err(err)
	}
	return cfg, nil
}

// SecretSources lists every secret setting of c by its field name.
func (c Config) SecretSources() map[string]bus.Secret {
	out := map[string]bus.Secret{
		"control.secret":     {Value: c.Control.Secret, Env: c.Control.SecretEnv, File: c.Control.SecretFile},
		"http.viewer_secret": {Value: c.HTTP.ViewerSecret, Env: c.HTTP.ViewerSecretEnv, File: c.HTTP.ViewerSecretFile},
		"bus.auth.password":  {Value: c.Bus.Auth.Password, Env: c.Bus.Auth.PasswordEnv, File: c.Bus.Auth.PasswordFile},
		"bus.auth.token":     {Value: c.Bus.Auth.Token, Env: c.Bus.Auth.TokenEnv, File: c.Bus.Auth.TokenFile},
	}
	for i, u := range c.Bus.Users {
		out[fmt.Sprintf("bus.users[%d].password", i)] = bus.Secret{Value: u.Password, Env: u.PasswordEnv, File: u.PasswordFile}
	}
	return out
}

// secretValues resolves every secret setting it can, for redaction only:
// one that cannot be resolved is skipped here and reported, with its
// field, when the daemon starts or check runs.
func (c Config) secretValues(getenv func(string) string) []string {
	var out []string
	for _, s := range c.SecretSources() {
		if v, _, err := s.Resolve(getenv); err == nil && v != "" {
			out = append(out, v)
		}
	}
	return out
}

// Secrets returns the values to hide in logs and output (see redactor).
func (c Config) Secrets() []string { return append([]string(nil), c.secrets...) }

// DefaultFrameTimeout is how long a camera may go without a frame while
// armed before it is reported lost.
const DefaultFrameTimeout = 3 * time.Second

// DefaultOpenCVThreads is OpenCV's pool size unless the config says
// otherwise. Measured with stillwater bench, one camera at 640×360 15 fps
// over a 30 s window: 7.53 ms CPU per frame with one OpenCV thread, 8.24 ms
// with OpenCV's default of one per CPU (two on that machine). A camera's
// operations are small and each camera already has its own goroutine, so
// handing them to other threads costs more than it gains.
const DefaultOpenCVThreads = 1

// validateOpenCVThreads accepts 0 (OpenCV's default) to four threads per
// CPU, the range vision.SetThreads takes on a machine with cpus CPUs.
func validateOpenCVThreads(n, cpus int) error {
	if n < 0 || n > 4*cpus {
		return fmt.Errorf("opencv_threads: %d; want 0 (OpenCV's default, one per CPU) to %d (four per CPU on this machine's %d); 1 is the default", n, 4*cpus, cpus)
	}
	return nil
}

// ApplyOpenCVThreads sizes OpenCV's worker pool, which the whole process
// shares, to opencv_threads. Call it once at start-up, before any camera
// opens.
func (c Config) ApplyOpenCVThreads() error {
	if err := vision.SetThreads(c.OpenCVThreads); err != nil {
		return fmt.Errorf("opencv_threads: %w", err)
	}
	return nil
}

// Validate checks every field and names the first one that is wrong.
func (c Config) Validate() error {
	if c.DataDir == "" {
		return errors.New("data_dir: empty; set a writable directory such as /var/lib/stillwater")
	}
	if err := validateBus(c.Bus); err != nil {
		return err
	}
	if err := validateControl(c.Control, c.Bus); err != nil {
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
	if c.HeartbeatEvery < Duration(time.Second) {
		return fmt.Errorf("heartbeat_every: %v; want at least 1s (10s is typical)", time.Duration(c.HeartbeatEvery))
	}
	if err := c.Evidence.validate(); err != nil {
		return err
	}
	if err := validateOpenCVThreads(c.OpenCVThreads, runtime.NumCPU()); err != nil {
		return err
	}
	if _, err := c.Schedules(); err != nil {
		return err
	}
	if len(c.Cameras) == 0 {
		return errors.New("cameras: none configured; add at least one camera with id, source, pool and corners")
	}
	if err := oneSecretSource(c.HTTP.ViewerSecret, c.HTTP.ViewerSecretEnv, c.HTTP.ViewerSecretFile, false); err != nil {
		return fmt.Errorf("http.viewer_secret: %v", err)
	}
	if c.Control.TokenName != "" {
		if err := validTokenName(c.Control.TokenName); err != nil {
			return fmt.Errorf("control.token_name: %v", err)
		}
	}
	ids := map[string]bool{}
	for i, cam := range c.Cameras {
		where := fmt.Sprintf("cameras[%d]", i)
		if err := validCameraID(cam.ID); err != nil {
			return fmt.Errorf("%s.id: %v", where, err)
		}
		if err := alert.ReservedCamera(cam.ID); err != nil {
			return fmt.Errorf("%s.id: %v; choose another name", where, err)
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
		if err := validateStreams(where, cam, c.Evidence); err != nil {
			return err
		}
		if err := ValidateCalibration(where, cam.CalibrationConfig); err != nil {
			return err
		}
		cal, err := BuildCalibration(cam.CalibrationConfig)
		if err != nil {
			return fmt.Errorf("%s: calibration: %w", where, err)
		}
		if cam.SourcePx != ([2]int{}) {
			if _, err := BuildCalibration(DetectionCamera(cam).CalibrationConfig); err != nil {
				return fmt.Errorf("%s: calibration scaled to source_px %v: %w", where, cam.SourcePx, err)
			}
		}
		if err := ValidateDetect(where, cam.Detect); err != nil {
			return err
		}
		if err := ValidateZones(where, cam, cal); err != nil {
			return err
		}
		if cam.FrameTimeout < Duration(500*time.Millisecond) || cam.FrameTimeout > Duration(20*time.Second) {
			return fmt.Errorf("%s.frame_timeout: %v; want between 500ms and 20s (3s is the default)", where, time.Duration(cam.FrameTimeout))
		}
	}
	return nil
}

// maxCameraID is the longest camera id. An id is a NATS subject token
// (PREFIX.ID.KIND) and part of evidence file names; 64 keeps both far
// from their limits (a file name of 255 bytes, the server's 4 KiB control
// line) with room for the prefix and the time stamp.
const maxCameraID = 64

var cameraIDChars = regexp.MustCompile(`^[A-Za-z0-9_-]+$`)

// validCameraID accepts 1 to 64 ASCII letters, digits, _ and -: safe in
// subjects, MQTT topics, file names and URLs alike.
func validCameraID(id string) error {
	const fix = "use 1 to 64 letters, digits, _ or - (the id names bus subjects and evidence files), such as pool or north"
	switch {
	case id == "":
		return errors.New("empty; " + fix)
	case len(id) > maxCameraID:
		return fmt.Errorf("%d characters, over the %d allowed; %s", len(id), maxCameraID, fix)
	case !cameraIDChars.MatchString(id):
		bad := id[strings.IndexFunc(id, func(r rune) bool { return !cameraIDChars.MatchString(string(r)) }):]
		r, _ := utf8.DecodeRuneInString(bad)
		return fmt.Errorf("%q contains %q; %s", id, string(r), fix)
	}
	return nil
}

// validTokenName checks control.token_name, recorded as "http:NAME".
func validTokenName(s string) error {
	if len(s) > 64 || strings.IndexFunc(s, func(r rune) bool { return !unicode.IsPrint(r) || unicode.IsSpace(r) }) >= 0 {
		return fmt.Errorf("%q: want 1 to 64 printable characters without spaces, such as owner or alice", s)
	}
	return nil
}

func (e EvidenceConfig) validate() error {
	switch {
	case e.PreRoll < 0 || e.PreRoll > Duration(60*time.Second):
		return fmt.Errorf("evidence.pre_roll: %v; want 0 to 60s", time.Duration(e.PreRoll))
	case e.PostRoll < 0 || e.PostRoll > Duration(120*time.Second):
		return fmt.Errorf("evidence.post_roll: %v; want 0 to 120s", time.Duration(e.PostRoll))
	case e.MaxFiles < 1:
		return fmt.Errorf("evidence.max_files: %d; want a positive count", e.MaxFiles)
	case e.MaxMB < 1:
		return fmt.Errorf("evidence.max_mb: %d; want a positive size in MB", e.MaxMB)
	case e.MaxAge < Duration(time.Hour):
		return fmt.Errorf("evidence.max_age: %v; want at least 1h", time.Duration(e.MaxAge))
	case strings.Contains(e.RingDir, "|"):
		return fmt.Errorf("evidence.ring_dir: %q; a directory whose path has no |", e.RingDir)
	}
	return nil
}

// Schedules parses each camera's arming schedule (its own or the default).
// A camera with no windows anywhere is armed around the clock (nil).
func (c Config) Schedules() (map[string]*arming.Schedule, error) {
	loc, err := c.Zone()
	if err != nil {
		return nil, fmt.Errorf("arming.time_zone: %v", err)
	}
	def, err := parseSchedule(loc, c.Arming.Schedule)
	if err != nil {
		return nil, fmt.Errorf("arming.schedule: %w", err)
	}
	out := map[string]*arming.Schedule{}
	for i, cam := range c.Cameras {
		out[cam.ID] = def
		if len(cam.Schedule) == 0 {
			continue
		}
		s, err := parseSchedule(loc, cam.Schedule)
		if err != nil {
			return nil, fmt.Errorf("cameras[%d] (%s).schedule: %w", i, cam.ID, err)
		}
		out[cam.ID] = s
	}
	return out, nil
}

// Zone resolves arming.time_zone. A system zone (Local) that cannot be
// resolved is an error only when a schedule needs it; a misspelt zone
// name always is.
func (c Config) Zone() (*time.Location, error) {
	loc, err := loadZone(c.Arming.TimeZone)
	if err == nil || c.Arming.TimeZone != "Local" {
		return loc, err
	}
	if len(c.Arming.Schedule) > 0 {
		return nil, err
	}
	for _, cam := range c.Cameras {
		if len(cam.Schedule) > 0 {
			return nil, err
		}
	}
	return time.UTC, nil
}

func parseSchedule(loc *time.Location, windows []string) (*arming.Schedule, error) {
	if len(windows) == 0 {
		return nil, nil
	}
	return arming.ParseScheduleIn(loc, windows)
}

// loadZone loads an IANA zone with an error that says how to write one.
// Local is the machine's own zone, found under its IANA name.
func loadZone(name string) (*time.Location, error) {
	if name == "" {
		return nil, errors.New("empty; write an IANA zone such as Europe/Berlin, or Local for the system zone")
	}
	if name == "Local" {
		return systemZone()
	}
	loc, err := time.LoadLocation(name)
	if err != nil {
		return nil, fmt.Errorf("%q is not a known IANA time zone (write e.g. Europe/Berlin or America/New_York)", name)
	}
	return loc, nil
}

// systemZone is the zone "Local" stands for, looked up the way the C
// library does: TZ when set (empty is UTC), else the zone /etc/localtime
// links to, else the name in /etc/timezone, else the rules in
// /etc/localtime itself; a machine with none of these runs on UTC.
// Looking it up by name keeps reasons and check's output readable
// ("Europe/Berlin" rather than "Local").
func systemZone() (*time.Location, error) {
	if tz, ok := os.LookupEnv("TZ"); ok {
		tz = strings.TrimPrefix(tz, ":")
		if tz == "" {
			return time.UTC, nil
		}
		if filepath.IsAbs(tz) {
			return zoneFromFile(tz)
		}
		loc, err := time.LoadLocation(tz)
		if err != nil {
			return nil, fmt.Errorf("Local is the system zone, and the TZ environment variable names %q, which is not a known zone; fix TZ or write the zone here", tz)
		}
		return loc, nil
	}
	if target, err := os.Readlink("/etc/localtime"); err == nil {
		if _, name, ok := strings.Cut(target, "zoneinfo/"); ok {
			if loc, err := time.LoadLocation(name); err == nil {
				return loc, nil
			}
		}
	}
	if b, err := os.ReadFile("/etc/timezone"); err == nil {
		if loc, err := time.LoadLocation(strings.TrimSpace(string(b))); err == nil {
			return loc, nil
		}
	}
	if _, err := os.Stat("/etc/localtime"); err == nil {
		return zoneFromFile("/etc/localtime")
	}
	return time.UTC, nil
}

// zoneFromFile reads zone rules from a TZif file, named after the part
// of its path below zoneinfo/ when there is one.
func zoneFromFile(path string) (*time.Location, error) {
	b, err := os.ReadFile(path)
	if err != nil {
		return nil, fmt.Errorf("Local is the system zone: %v", err)
	}
	name := path
	if _, n, ok := strings.Cut(path, "zoneinfo/"); ok {
		name = n
	}
	loc, err := time.LoadLocationFromTZData(name, b)
	if err != nil {
		return nil, fmt.Errorf("Local is the system zone, but %s holds no zone rules: %v", path, err)
	}
	return loc, nil
}
