// Package cfgfile changes one camera's keys in the daemon's YAML
// configuration file in place, keeping the rest of the file (other keys,
// their order and comments) as written, and replaces the file so that a
// reader sees the old file or the new one, never a part.
package cfgfile

import (
	"bytes"
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"slices"
	"time"

	"gopkg.in/yaml.v3"
)

// ErrNoCamera is returned (wrapped) when the file lists no camera with the
// id asked for.
var ErrNoCamera = errors.New("camera not in the configuration file")

// SetCameraKeys returns src with the mapping of the camera whose id is
// camera, in the top-level cameras list, changed: the keys in drop are
// removed, then each key of set (a mapping) replaces the key of that name
// or is added at the end. Errors name what in src is not as expected.
func SetCameraKeys(src []byte, camera string, drop []string, set *yaml.Node) ([]byte, error) {
	if set == nil || set.Kind != yaml.MappingNode {
		return nil, errors.New("set camera keys: the keys to set are not a mapping")
	}
	var doc yaml.Node
	if err := yaml.Unmarshal(src, &doc); err != nil {
		return nil, fmt.Errorf("read configuration: %w", err)
	}
	if doc.Kind != yaml.DocumentNode || len(doc.Content) != 1 || doc.Content[0].Kind != yaml.MappingNode {
		return nil, errors.New("configuration: the file is not a YAML mapping")
	}
	cams := value(doc.Content[0], "cameras")
	if cams == nil || cams.Kind != yaml.SequenceNode {
		return nil, errors.New("configuration: no cameras list")
	}
	var cam *yaml.Node
	for _, c := range cams.Content {
		if c.Kind != yaml.MappingNode {
			continue
		}
		if id := value(c, "id"); id != nil && id.Kind == yaml.ScalarNode && id.Value == camera {
			cam = c
			break
		}
	}
	if cam == nil {
		return nil, fmt.Errorf("configuration: camera %q: %w", camera, ErrNoCamera)
	}
	kept := cam.Content[:0:0]
	for i := 0; i+1 < len(cam.Content); i += 2 {
		if slices.Contains(drop, cam.Content[i].Value) {
			continue
		}
		kept = append(kept, cam.Content[i], cam.Content[i+1])
	}
	cam.Content = kept
	for i := 0; i+1 < len(set.Content); i += 2 {
		k, v := set.Content[i], set.Content[i+1]
		replaced := false
		for j := 0; j+1 < len(cam.Content); j += 2 {
			if cam.Content[j].Value == k.Value {
				cam.Content[j+1] = v
				replaced = true
				break
			}
		}
		if !replaced {
			cam.Content = append(cam.Content, k, v)
		}
	}
	// A camera written as a flow mapping ({id: a, source: b}) becomes a
	// block one: the calibration does not fit on a line.
	cam.Style &^= yaml.FlowStyle
	var b bytes.Buffer
	enc := yaml.NewEncoder(&b)
	enc.SetIndent(2)
	if err := enc.Encode(&doc); err != nil {
		return nil, fmt.Errorf("write configuration: %w", err)
	}
	if err := enc.Close(); err != nil {
		return nil, fmt.Errorf("write configuration: %w", err)
	}
	return b.Bytes(), nil
}

// value returns the value of key in mapping m, or nil.
func value(m *yaml.Node, key string) *yaml.Node {
	for i := 0; i+1 < len(m.Content); i += 2 {
		if m.Content[i].Kind == yaml.ScalarNode && m.Content[i].Value == key {
			return m.Content[i+1]
		}
	}
	return nil
}

// keep writes data to a new file named name, or name-2, name-3 … when
// that is taken, and returns the name used: an earlier copy is never
// written over.
func keep(name string, data []byte, mode os.FileMode) (string, error) {
	for i := 1; ; i++ {
		p := name
		if i > 1 {
			p = fmt.Sprintf("%s-%d", name, i)
		}
		f, err := os.OpenFile(p, os.O_WRONLY|os.O_CREATE|os.O_EXCL, mode)
		if errors.Is(err, os.ErrExist) && i < 1000 {
			continue
		}
		if err != nil {
			return "", err
		}
		if _, err := f.Write(data); err != nil {
			f.Close()
			return "", err
		}
		return p, f.Close()
	}
}

// Replace writes data to path through a temporary file in the same
// directory and a rename, keeping the file's mode. The file as it was is
// kept beside it as PATH.prev-TIME (UTC, to the second; -2, -3 … added
// for more in the same second), so that nothing written by hand is lost;
// it returns that name.
func Replace(path string, data []byte, now time.Time) (prev string, err error) {
	old, err := os.ReadFile(path)
	if err != nil {
		return "", fmt.Errorf("replace %s: %w", path, err)
	}
	st, err := os.Stat(path)
	if err != nil {
		return "", fmt.Errorf("replace %s: %w", path, err)
	}
	if prev, err = keep(path+".prev-"+now.UTC().Format("20060102T150405Z"), old, st.Mode().Perm()); err != nil {
		return "", fmt.Errorf("keep the previous configuration: %w", err)
	}
	tmp, err := os.CreateTemp(filepath.Dir(path), "."+filepath.Base(path)+".new-*")
	if err != nil {
		return "", fmt.Errorf("replace %s: %w", path, err)
	}
	defer os.Remove(tmp.Name()) // after the rename there is nothing to remove
	if _, err := tmp.Write(data); err != nil {
		tmp.Close()
		return "", fmt.Errorf("replace %s: %w", path, err)
	}
	if err := tmp.Chmod(st.Mode().Perm()); err != nil {
		tmp.Close()
		return "", fmt.Errorf("replace %s: %w", path, err)
	}
	if err := tmp.Sync(); err != nil {
		tmp.Close()
		return "", fmt.Errorf("replace %s: %w", path, err)
	}
	if err := tmp.Close(); err != nil {
		return "", fmt.Errorf("replace %s: %w", path, err)
	}
	if err := os.Rename(tmp.Name(), path); err != nil {
		return "", fmt.Errorf("replace %s: %w", path, err)
	}
	return prev, nil
}
