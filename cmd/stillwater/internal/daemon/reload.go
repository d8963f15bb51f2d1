package daemon

import (
	"fmt"
	"log/slog"
	"os"
	"reflect"
	"slices"
	"strings"
	"time"

	"stillwater/alert/arming"
	"stillwater/cmd/stillwater/internal/config"
	"stillwater/cmd/stillwater/internal/redact"
	"stillwater/cmd/stillwater/internal/watch"
)

// reloadTargets are the parts of the running daemon a reload changes.
// Any func may be nil (tests).
type reloadTargets struct {
	watches      []*watch.Camera
	setSchedules func(map[string]*arming.Schedule) error
	setAccess    func(access) error
	setMaxDisarm func(time.Duration) ([]string, error)
}

// reloader applies SIGHUP's configurations one after another. running is
// what the daemon started with: a setting that needs a restart is named
// in every reload line until the daemon restarts with it.
type reloader struct {
	log     *slog.Logger
	running config.Config
	prev    config.Config
	acc     access
	getenv  func(string) string
	to      reloadTargets
}

func newReloader(log *slog.Logger, running config.Config, acc access, to reloadTargets) *reloader {
	return &reloader{log: log, running: running, prev: running, acc: acc, getenv: os.Getenv, to: to}
}

// apply hands each running camera its new settings, swaps the schedules,
// the control and viewer tokens and max_disarm, and logs one line saying
// what changed and which settings wait for a restart. Cameras added,
// removed or pointed at another source need a restart.
func (r *reloader) apply(next config.Config) {
	log := redact.WithRedaction(r.log, next.Secrets()...)
	sch, err := next.Schedules()
	if err != nil {
		log.Error("reload refused", "err", err)
		return
	}
	changed := changedKeys(r.prev, next)
	pending := restartKeys(r.running, next)

	byID := map[string]config.CameraConfig{}
	for _, c := range next.Cameras {
		byID[c.ID] = c
	}
	held := map[string]bool{} // cameras not reloaded in place
	for _, w := range r.to.watches {
		c, ok := byID[w.Cam.ID]
		switch {
		case !ok:
			log.Warn("reload: camera removed from the config; it keeps running until restart", "camera", w.Cam.ID)
			continue
		case c.Source != w.Cam.Source || c.Transport != w.Cam.Transport:
			log.Warn("reload: camera source changed; restart to use it", "camera", w.Cam.ID)
			held[w.Cam.ID] = true
			continue
		}
		delete(byID, c.ID)
		select {
		case <-w.Reload: // an older reload not yet taken: replace it
		default:
		}
		w.Reload <- c
	}
	for id := range byID {
		log.Warn("reload: new camera in the config; restart to start it", "camera", id)
	}
	if r.to.setSchedules != nil {
		if err := r.to.setSchedules(sch); err != nil {
			log.Error("reload: schedules refused", "err", err)
		}
	}

	tokens := "unchanged"
	if acc, warn, err := accessOf(next, r.getenv); err != nil {
		log.Error("reload: control and viewer tokens kept as they were", "err", err)
		tokens = "kept (error)"
	} else {
		config.LogWarnings(log, warn)
		if acc != r.acc {
			tokens = "changed"
			if r.to.setAccess != nil {
				if err := r.to.setAccess(acc); err != nil {
					log.Error("reload: control and viewer tokens kept as they were", "err", err)
					tokens = "kept (error)"
				}
			}
		}
		if tokens == "changed" {
			if acc.control != r.acc.control {
				log.Warn("reload: control token replaced; the old one is refused from now on")
			}
			if acc.viewer != r.acc.viewer {
				log.Warn("reload: viewer token replaced; the old one is refused from now on")
			}
			r.acc = acc
		}
	}
	if r.to.setMaxDisarm != nil && next.Control.MaxDisarm != r.prev.Control.MaxDisarm {
		cut, err := r.to.setMaxDisarm(time.Duration(next.Control.MaxDisarm))
		switch {
		case err != nil:
			log.Error("reload: max_disarm not changed", "err", err)
		case len(cut) > 0:
			log.Warn("reload: running disarms cut to the new max_disarm", "cameras", cut, "max_disarm", time.Duration(next.Control.MaxDisarm).String())
		}
	}

	var applied []string
	for _, k := range changed {
		id, _, isCam := cameraKey(k)
		if liveKey(k) && !(isCam && held[id]) {
			applied = append(applied, k)
		}
	}
	for id := range held {
		pending = append(pending, fmt.Sprintf("cameras[%s] (every setting: its source changed)", id))
	}
	slices.Sort(pending)
	pending = slices.Compact(pending)
	if applied == nil {
		applied = []string{}
	}
	if pending == nil {
		pending = []string{}
	}
	log.Info("configuration reloaded", "cameras", len(r.to.watches), "applied", applied, "tokens", tokens, "restart_needed", pending)
	r.prev = next
}

// restartKeys names the settings in which next differs from the running
// configuration and that only a restart applies; a calibration change
// that moves the detector's water outline is named too, because the
// outline is set when the camera opens.
func restartKeys(running, next config.Config) []string {
	var out []string
	for _, k := range changedKeys(running, next) {
		if !liveKey(k) {
			out = append(out, k)
		}
	}
	old := map[string]config.CameraConfig{}
	for _, c := range running.Cameras {
		old[c.ID] = c
	}
	for _, c := range next.Cameras {
		o, ok := old[c.ID]
		if !ok || reflect.DeepEqual(o.CalibrationConfig, c.CalibrationConfig) {
			continue
		}
		a, errA := config.NewCalibration(o)
		b, errB := config.NewCalibration(c)
		if errA == nil && errB == nil && !reflect.DeepEqual(a.Mask(), b.Mask()) {
			out = append(out, fmt.Sprintf("cameras[%s] water outline of the detector (calibration)", c.ID))
		}
	}
	return out
}

// liveCameraKeys are the settings under a camera that a reload applies
// in place, besides its calibration keys.
var liveCameraKeys = []string{"schedule", "zones", "detect.min_area_m2", "detect.max_area_m2", "detect.persist", "detect.update_every", "detect.clear_after"}

// liveKey reports whether a reload applies the setting in place.
func liveKey(k string) bool {
	for _, p := range []string{"arming.", "control.", "http.viewer_secret"} {
		if strings.HasPrefix(k, p) {
			return true
		}
	}
	_, rest, ok := cameraKey(k)
	if !ok || rest == "" {
		return false
	}
	if slices.Contains(liveCameraKeys, rest) {
		return true
	}
	first, _, _ := strings.Cut(rest, ".")
	return slices.Contains(yamlKeys(reflect.TypeOf(config.CalibrationConfig{})), first)
}

// cameraKey splits "cameras[ID].rest" into ID and rest.
func cameraKey(k string) (id, rest string, ok bool) {
	s, ok := strings.CutPrefix(k, "cameras[")
	if !ok {
		return "", "", false
	}
	id, rest, ok = strings.Cut(s, "]")
	if !ok {
		return "", "", false
	}
	if strings.HasPrefix(rest, " ") { // "cameras[ID] (added)"
		return id, "", true
	}
	return id, strings.TrimPrefix(rest, "."), true
}

// changedKeys lists the YAML keys whose values differ between a and b,
// dotted ("evidence.max_files"); cameras are matched by id
// ("cameras[pool].detect.threshold"), and one in a only or b only is
// "cameras[pool] (removed)" or "(added)".
func changedKeys(a, b config.Config) []string {
	var out []string
	diffStruct("", reflect.ValueOf(a), reflect.ValueOf(b), &out)
	inB := map[string]config.CameraConfig{}
	for _, c := range b.Cameras {
		inB[c.ID] = c
	}
	seen := map[string]bool{}
	for _, ca := range a.Cameras {
		seen[ca.ID] = true
		cb, ok := inB[ca.ID]
		if !ok {
			out = append(out, fmt.Sprintf("cameras[%s] (removed)", ca.ID))
			continue
		}
		diffStruct(fmt.Sprintf("cameras[%s]", ca.ID), reflect.ValueOf(ca), reflect.ValueOf(cb), &out)
	}
	for _, cb := range b.Cameras {
		if !seen[cb.ID] {
			out = append(out, fmt.Sprintf("cameras[%s] (added)", cb.ID))
		}
	}
	return out
}

// diffStruct appends the keys of the fields of two structs of one type
// that differ, recursing into nested sections.
func diffStruct(prefix string, a, b reflect.Value, out *[]string) {
	t := a.Type()
	for i := 0; i < t.NumField(); i++ {
		f := t.Field(i)
		name, inline := yamlName(f)
		if name == "" && !inline {
			continue
		}
		if prefix == "" && name == "cameras" {
			continue // matched by id in changedKeys
		}
		key := name
		if prefix != "" {
			key = prefix + "." + name
		}
		fa, fb := a.Field(i), b.Field(i)
		switch {
		case inline:
			diffStruct(prefix, fa, fb, out)
		case f.Type.Kind() == reflect.Struct && f.Type != reflect.TypeOf(time.Time{}):
			diffStruct(key, fa, fb, out)
		case !reflect.DeepEqual(fa.Interface(), fb.Interface()):
			*out = append(*out, key)
		}
	}
}

// yamlName is a field's YAML key; "" for unexported and skipped fields.
func yamlName(f reflect.StructField) (name string, inline bool) {
	if !f.IsExported() {
		return "", false
	}
	parts := strings.Split(f.Tag.Get("yaml"), ",")
	if parts[0] == "-" {
		return "", false
	}
	if slices.Contains(parts[1:], "inline") {
		return "", true
	}
	if parts[0] == "" {
		return strings.ToLower(f.Name), false
	}
	return parts[0], false
}

// yamlKeys lists the top-level YAML keys of a struct type.
func yamlKeys(t reflect.Type) []string {
	var out []string
	for i := 0; i < t.NumField(); i++ {
		if name, _ := yamlName(t.Field(i)); name != "" {
			out = append(out, name)
		}
	}
	return out
}
