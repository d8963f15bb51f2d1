// Package check says what the daemon would do with a configuration:
// the cameras, their calibration and resolution, zones, streams, arming,
// the bus and HTTP; and what this machine lacks for it.
package check

import (
	"errors"
	"fmt"
	"io"
	"io/fs"
	"os"
	"os/exec"
	"path/filepath"
	"sort"
	"strings"
	"syscall"
	"text/tabwriter"
	"time"

	"stillwater/alert"
	"stillwater/alert/arming"
	"stillwater/cmd/stillwater/internal/config"
	"stillwater/cmd/stillwater/internal/daemon"
	"stillwater/cmd/stillwater/internal/watch"
	"stillwater/homography"
	"stillwater/vision"
)

// HostProblems lists what the configuration asks of this machine that
// it does not have: a data directory that cannot be made or written, a
// source file or device that is not there, a secret that cannot be read.
// Checked as the user running check, which should be the daemon's.
func HostProblems(cfg config.Config, getenv func(string) string) []string {
	var out []string
	if err := checkDataDir(cfg.DataDir); err != nil {
		out = append(out, "data_dir: "+err.Error())
	}
	for i, cam := range cfg.Cameras {
		if err := checkSource(cam.Source); err != nil {
			out = append(out, fmt.Sprintf("cameras[%d] (%s).source: %v", i, cam.ID, err))
		}
		out = append(out, streamProblems(fmt.Sprintf("cameras[%d] (%s)", i, cam.ID), cfg, cam)...)
	}
	src := cfg.SecretSources()
	fields := make([]string, 0, len(src))
	for f := range src {
		fields = append(fields, f)
	}
	sort.Strings(fields)
	for _, f := range fields {
		if _, _, err := src[f].Resolve(getenv); err != nil {
			out = append(out, fmt.Sprintf("%s: %v", f, err))
		}
	}
	return out
}

// checkDataDir reports whether dir is, or can be made, a writable
// directory.
func checkDataDir(dir string) error {
	p := filepath.Clean(dir)
	for {
		fi, err := os.Stat(p)
		switch {
		case err == nil && !fi.IsDir():
			if p == filepath.Clean(dir) {
				return fmt.Errorf("%s is not a directory", dir)
			}
			return fmt.Errorf("%s cannot be made: %s is not a directory", dir, p)
		case err == nil:
			if syscall.Access(p, 0x2|0x1) != nil { // W_OK|X_OK
				if p == filepath.Clean(dir) {
					return fmt.Errorf("%s is not writable by uid %d; give the daemon's user the directory", dir, os.Getuid())
				}
				return fmt.Errorf("%s does not exist and %s is not writable by uid %d to make it; create it for the daemon's user", dir, p, os.Getuid())
			}
			return nil
		case !errors.Is(err, fs.ErrNotExist) && !errors.Is(err, syscall.ENOTDIR):
			return fmt.Errorf("%s: %v", dir, err)
		}
		parent := filepath.Dir(p)
		if parent == p {
			return fmt.Errorf("%s: no existing directory above it", dir)
		}
		p = parent
	}
}

// checkSource reports a file or device source that is not there; URLs
// are left to the camera itself.
func checkSource(src string) error {
	if strings.Contains(src, "://") {
		return nil
	}
	fi, err := os.Stat(src)
	switch {
	case errors.Is(err, fs.ErrNotExist):
		return fmt.Errorf("%s does not exist; give the path of a video file or device that is there, or an rtsp:// URL", src)
	case err != nil:
		return err
	case fi.IsDir():
		return fmt.Errorf("%s is a directory; give a video file or device", src)
	case strings.HasPrefix(src, "/dev/") && fi.Mode()&fs.ModeCharDevice == 0:
		return fmt.Errorf("%s is not a character device; a V4L2 camera is /dev/videoN", src)
	}
	f, err := os.Open(src)
	if err != nil {
		return fmt.Errorf("cannot be read: %v", err)
	}
	return f.Close()
}

// Describe prints the plan for a valid config: cameras, schedule in local
// time, bus and storage.
func Describe(w io.Writer, path string, cfg config.Config, now time.Time) error {
	sch, err := cfg.Schedules()
	if err != nil {
		return err
	}
	loc, err := cfg.Zone()
	if err != nil {
		return err
	}
	fmt.Fprintf(w, "%s: valid\n\n", path)
	fmt.Fprintf(w, "cameras (%d):\n", len(cfg.Cameras))
	for _, cam := range cfg.Cameras {
		transport := cam.Transport
		if transport == "" {
			transport = "backend default"
		}
		decoded := "deblocking filter skipped"
		if cam.Deblock {
			decoded = "deblocked"
		}
		fmt.Fprintf(w, "  %s  %s (transport %s; %s)\n", cam.ID, vision.Redact(cam.Source), transport, decoded)
		if err := describeStreams(w, cfg, cam); err != nil {
			return err
		}
		cal, err := config.NewCalibration(cam)
		if err != nil {
			return err
		}
		fmt.Fprintf(w, "    %s\n", calibrationLine(cam))
		if crossedCorners(cam, cal) {
			fmt.Fprintf(w, "    corners C and D are crossed (A, B, C, D in this order make a bow-tie); used as A, B, D, C: swap C and D in the config\n")
		}
		if pos, ok, estimated := cal.Camera(); ok {
			how := "measured"
			if estimated {
				how = "estimated from the calibration"
			}
			fmt.Fprintf(w, "    camera at x %.2f m, y %.2f m, %.2f m above the water (%s)\n", pos.X, pos.Y, pos.Height, how)
		}
		if cam.ReferenceFrame != "" {
			fmt.Fprintf(w, "    camera-moved check against %s\n", cam.ReferenceFrame)
		}
		fmt.Fprintf(w, "    %s\n", resolution(cal))
		if g, ok, err := detectionGrid(cam); err != nil {
			return err
		} else if ok {
			for _, l := range g.lines() {
				fmt.Fprintf(w, "    %s\n", l)
			}
		}
		if n := len(cam.Zones); n > 0 {
			fmt.Fprintf(w, "    %d exclusion zone(s)\n", n)
		}
		fmt.Fprintf(w, "    %s\n", config.DetectLine(cam.Detect))
		fmt.Fprintf(w, "    camera lost after %v without a frame while armed\n", time.Duration(cam.FrameTimeout))
		fmt.Fprintf(w, "    %s\n", armingLine(sch[cam.ID], loc, cfg.Arming.TimeZone == "Local", now))
	}
	fmt.Fprintf(w, "  %s\n", openCVLine(cfg.OpenCVThreads))
	fmt.Fprintln(w)
	fmt.Fprintln(w, "bus:")
	if cfg.Bus.Embedded() {
		fmt.Fprintf(w, "  embedded NATS server on %s, JetStream store in %s/jetstream\n", cfg.Bus.Listen, cfg.DataDir)
		if cfg.Bus.MQTT != "" {
			fmt.Fprintf(w, "  MQTT listener on %s (topics %s/CAMERA/KIND)\n", cfg.Bus.MQTT, cfg.Bus.Prefix)
		}
	} else {
		var servers []string
		for _, u := range strings.Split(cfg.Bus.ServerURLs(), ",") {
			servers = append(servers, vision.Redact(u))
		}
		fmt.Fprintf(w, "  external NATS %s\n", strings.Join(servers, ", "))
	}
	if names := cfg.Bus.Consumers(); len(names) > 0 {
		fmt.Fprintf(w, "  durable consumers kept for %s (each binds the one named after it)\n", strings.Join(names, ", "))
	}
	tw := tabwriter.NewWriter(w, 2, 4, 2, ' ', 0)
	for _, k := range []string{alert.KindTarget, alert.KindCleared, alert.KindFault, alert.KindArmed, alert.KindBeat} {
		fmt.Fprintf(tw, "  %s\t%s\n", k, alert.Subject(cfg.Bus.Prefix, "CAMERA", k))
	}
	tw.Flush()
	fmt.Fprintf(w, "  heartbeat every %v per camera\n", time.Duration(cfg.HeartbeatEvery))
	fmt.Fprintf(w, "  unacknowledged messages wait in %s/outbox\n", cfg.DataDir)
	who := cfg.Control.TokenName
	if who == "" {
		who = arming.DefaultTokenName
	}
	switch c := cfg.Control; {
	case c.SecretEnv != "":
		fmt.Fprintf(w, "  control (arm, disarm) needs the secret from $%s; whoever uses it is recorded as %q\n\n", c.SecretEnv, who)
	case c.SecretFile != "":
		fmt.Fprintf(w, "  control (arm, disarm) needs the secret in %s; whoever uses it is recorded as %q\n\n", c.SecretFile, who)
	case c.Secret != "":
		fmt.Fprintf(w, "  control (arm, disarm) needs the secret written in the config (better: secret_env or secret_file); whoever uses it is recorded as %q\n\n", who)
	case c.TrustNATS:
		fmt.Fprintf(w, "  control (arm, disarm) over NATS by operator-role users on %s, recorded as nats:USER; HTTP control refused\n\n",
			alert.UserControlSubject(cfg.Bus.Prefix, "USER", "ACTION"))
	default:
		fmt.Fprint(w, "  control: no secret, so arm and disarm requests are refused; status only\n\n")
	}
	fmt.Fprintf(w, "http: metrics, /healthz and /readyz on %s\n", cfg.HTTP.Listen)
	switch c := cfg.HTTP; {
	case daemon.LoopbackListen(c.Listen):
		fmt.Fprintln(w, "  camera pictures (/cameras/ID/latest.jpg) open: the listener is loopback")
	case c.ViewerSecret != "" || c.ViewerSecretEnv != "" || c.ViewerSecretFile != "":
		fmt.Fprintln(w, "  camera pictures (/cameras/ID/latest.jpg) need the viewer or the control token")
	case cfg.Control.Secret != "" || cfg.Control.SecretEnv != "" || cfg.Control.SecretFile != "":
		fmt.Fprintln(w, "  camera pictures (/cameras/ID/latest.jpg) need the control token (a separate http.viewer_secret is better)")
	default:
		fmt.Fprintln(w, "  camera pictures (/cameras/ID/latest.jpg) refused: the listener is not loopback and no token is set")
	}
	if cfg.Evidence.On() {
		e := cfg.Evidence
		fmt.Fprintf(w, "evidence: %s/evidence, %v before and %v after each alarm; keep at most %d files, %d MB, %v\n",
			cfg.DataDir, time.Duration(e.PreRoll), time.Duration(e.PostRoll), e.MaxFiles, e.MaxMB, time.Duration(e.MaxAge))
	} else {
		fmt.Fprintln(w, "evidence: off")
	}
	return nil
}

// openCVLine says how many threads OpenCV's pool, shared by the cameras,
// will have.
func openCVLine(n int) string {
	if n == 0 {
		return "OpenCV's worker pool, shared by the cameras: one thread per CPU (opencv_threads 0)"
	}
	return fmt.Sprintf("OpenCV's worker pool, shared by the cameras: %d thread(s) (opencv_threads %d)", n, n)
}

// calibrationLine summarises how pixels become pool metres.
func calibrationLine(cam config.CameraConfig) string {
	c := cam.CalibrationConfig
	var b strings.Builder
	if len(c.Reference) > 0 {
		fmt.Fprintf(&b, "freeform pool from %d reference points, outline of %d points", len(c.Reference), len(c.Outline))
	} else {
		fmt.Fprintf(&b, "pool %g × %g m, corners A %v B %v C %v D %v px", c.Pool.Length, c.Pool.Width, c.Corners[0], c.Corners[1], c.Corners[2], c.Corners[3])
	}
	switch {
	case c.Lens != nil && len(c.Lens.Dist) > 0:
		b.WriteString(", lens distortion corrected")
	case c.Lens != nil && c.Lens.HFOVDeg > 0:
		fmt.Fprintf(&b, ", field of view %g°", c.Lens.HFOVDeg)
	}
	switch {
	case c.Water.Depth > 0:
		fmt.Fprintf(&b, ", floor positions at %g m depth", c.Water.Depth)
	case c.Water.Deep > 0:
		fmt.Fprintf(&b, ", floor positions on a %g–%g m floor", c.Water.Shallow, c.Water.Deep)
	default:
		b.WriteString(", floor position = surface position (no water depth set)")
	}
	return b.String()
}

// resolution reports metres per pixel at the sharpest and coarsest point
// of the water outline, which says how small a child the camera resolves.
func resolution(cal *homography.Calibration) string {
	best, worst := 0.0, 0.0
	for i, p := range cal.Mask() {
		m := cal.MetresPerPixel(p)
		if i == 0 || m < best {
			best = m
		}
		if m > worst {
			worst = m
		}
	}
	return fmt.Sprintf("resolution %.1f–%.1f cm per pixel across the water outline", best*100, worst*100)
}

// crossedCorners reports whether the calibration uses the corners in
// another order than written (C and D swapped to undo a bow-tie).
func crossedCorners(cam config.CameraConfig, cal *homography.Calibration) bool {
	corners := cal.Corners()
	if len(cam.Corners) != 4 || len(corners) != 4 {
		return false
	}
	for i, p := range cam.Corners {
		if corners[i].X != p[0] || corners[i].Y != p[1] {
			return true
		}
	}
	return false
}

// armingLine says whether the camera is armed at now and when that
// changes, in the schedule's zone; system says the zone is the machine's
// (time_zone Local).
func armingLine(s *arming.Schedule, loc *time.Location, system bool, now time.Time) string {
	if s == nil {
		return "armed around the clock (no schedule)"
	}
	state := "disarmed"
	if s.Armed(now) {
		state = "armed"
	}
	zone := loc.String()
	if system {
		zone += " (the system's zone, time_zone Local)"
	}
	var b strings.Builder
	fmt.Fprintf(&b, "schedule in %s: %s at %s", zone, state, now.In(loc).Format("Mon 2006-01-02 15:04 MST"))
	if next, ok := s.Next(now); ok {
		fmt.Fprintf(&b, ", changes at %s", next.In(loc).Format("Mon 2006-01-02 15:04 MST"))
	}
	return b.String()
}

// describeStreams prints, for check, what the camera decodes and what it
// copies.
func describeStreams(w io.Writer, cfg config.Config, cam config.CameraConfig) error {
	if sp := cam.SourcePx; sp != ([2]int{}) && sp != cam.Frame {
		cal, err := config.NewCalibration(config.DetectionCamera(cam))
		if err != nil {
			return err
		}
		fmt.Fprintf(w, "    searched at %d×%d px (source_px), the calibration scaled from %d×%d px (frame_px); %s\n",
			sp[0], sp[1], cam.Frame[0], cam.Frame[1], resolution(cal))
	}
	if cam.EvidenceSource == "" {
		return nil
	}
	e := cfg.Evidence
	fmt.Fprintf(w, "    evidence stream %s: copied without decoding (ffmpeg) into a pre-roll ring in %s, segments of about %v; clips %v before to %v after each alarm (.mp4)\n",
		vision.Redact(cam.EvidenceSource), watch.RingDir(cfg, cam.ID), watch.RingSegment, time.Duration(e.PreRoll), time.Duration(e.PostRoll))
	return nil
}

// streamProblems lists what the evidence stream needs of this machine:
// ffmpeg on PATH, a file that is there, a ring directory that can be
// made.
func streamProblems(where string, cfg config.Config, cam config.CameraConfig) []string {
	if cam.EvidenceSource == "" {
		return nil
	}
	var out []string
	if _, err := exec.LookPath("ffmpeg"); err != nil {
		out = append(out, where+".evidence_source: the evidence stream is copied by ffmpeg, which is not on PATH; install it (deploy/setup)")
	}
	if err := checkSource(cam.EvidenceSource); err != nil {
		out = append(out, fmt.Sprintf("%s.evidence_source: %v", where, err))
	}
	if err := checkDataDir(watch.RingDir(cfg, cam.ID)); err != nil {
		out = append(out, "evidence.ring_dir: "+err.Error())
	}
	return out
}
