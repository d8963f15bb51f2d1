package synth

import (
	"context"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"syscall"
	"time"
)

// CacheEnv overrides the render cache directory CacheDir returns.
const CacheEnv = "STILLWATER_SYNTH_CACHE"

// CacheDir returns the render cache of this checkout, testdata/cache/synth
// under the module root (git ignores it), found by looking up from the
// working directory for go.mod; CacheEnv overrides it.
func CacheDir() (string, error) {
	if d := os.Getenv(CacheEnv); d != "" {
		return d, nil
	}
	dir, err := os.Getwd()
	if err != nil {
		return "", fmt.Errorf("render cache: %w", err)
	}
	for {
		if _, err := os.Stat(filepath.Join(dir, "go.mod")); err == nil {
			return filepath.Join(dir, "testdata", "cache", "synth"), nil
		}
		up := filepath.Dir(dir)
		if up == dir {
			return "", errors.New("render cache: no go.mod above the working directory; set " + CacheEnv)
		}
		dir = up
	}
}

// CacheKey names a scene's rendered files: the scene (every field) and
// RendererVersion hashed, prefixed for a family scene by its variant and
// seed so a directory listing reads.
func CacheKey(s Scene) string {
	b, err := json.Marshal(s)
	if err != nil {
		// A Scene holds only numbers, strings, slices and pointers to
		// such; Marshal cannot fail on it.
		panic(fmt.Sprintf("synth: marshal scene: %v", err))
	}
	h := sha256.New()
	fmt.Fprintf(h, "%s\n", RendererVersion)
	h.Write(b)
	sum := hex.EncodeToString(h.Sum(nil))[:16]
	if s.World != nil {
		return fmt.Sprintf("%s-%d-%s", s.World.Variant, s.Seed, sum)
	}
	return fmt.Sprintf("scene-%d-%s", s.Seed, sum)
}

// Cached renders s once into dir (keyed by a hash of the scene and a
// renderer version constant) and returns the paths; concurrent callers for
// the same key wait for one render. Callers in other processes wait too
// (an flock on a lock file beside the clip). A clip counts as rendered when
// its label file exists: the labels are moved into place last; the lock
// file goes once the clip is in place.
func Cached(ctx context.Context, s Scene, dir string) (video, labels string, t Truth, err error) {
	key := CacheKey(s)
	video = filepath.Join(dir, key+VideoExt(s))
	labels = filepath.Join(dir, key+".json")
	if t, err := readCached(video, labels); err == nil {
		return video, labels, t, nil
	}
	if err := os.MkdirAll(dir, 0o755); err != nil {
		return "", "", Truth{}, fmt.Errorf("render cache: %w", err)
	}
	lock := filepath.Join(dir, key+".lock")
	unlock, err := lockFile(ctx, lock)
	if err != nil {
		return "", "", Truth{}, fmt.Errorf("render cache %s: %w", key, err)
	}
	defer unlock()
	// Once the clip is in place nobody needs the lock file: callers that
	// come later find the clip first, and one already waiting holds the
	// file open.
	defer func() {
		if err == nil {
			os.Remove(lock)
		}
	}()
	if t, err := readCached(video, labels); err == nil {
		return video, labels, t, nil
	}
	tmpVideo := filepath.Join(dir, fmt.Sprintf("%s.tmp%d%s", key, os.Getpid(), VideoExt(s)))
	defer os.Remove(tmpVideo)
	t, err = Render(ctx, s, tmpVideo, "")
	if err != nil {
		return "", "", Truth{}, fmt.Errorf("render cache %s: %w", key, err)
	}
	t.Clip = filepath.Base(video)
	if err := os.Rename(tmpVideo, video); err != nil {
		return "", "", Truth{}, fmt.Errorf("render cache: %w", err)
	}
	tmpLabels := filepath.Join(dir, fmt.Sprintf("%s.tmp%d.json", key, os.Getpid()))
	if err := writeTruth(tmpLabels, t); err != nil {
		return "", "", Truth{}, fmt.Errorf("render cache: %w", err)
	}
	if err := os.Rename(tmpLabels, labels); err != nil {
		os.Remove(tmpLabels)
		return "", "", Truth{}, fmt.Errorf("render cache: %w", err)
	}
	return video, labels, t, nil
}

func readCached(video, labels string) (Truth, error) {
	if _, err := os.Stat(video); err != nil {
		return Truth{}, err
	}
	return ReadTruth(labels)
}

// lockFile takes an exclusive flock on path, polling until it is free or
// ctx ends, and returns the function that releases it.
func lockFile(ctx context.Context, path string) (func(), error) {
	f, err := os.OpenFile(path, os.O_CREATE|os.O_RDWR, 0o644)
	if err != nil {
		return nil, err
	}
	for {
		err := syscall.Flock(int(f.Fd()), syscall.LOCK_EX|syscall.LOCK_NB)
		if err == nil {
			return func() {
				_ = syscall.Flock(int(f.Fd()), syscall.LOCK_UN)
				f.Close()
			}, nil
		}
		if err != syscall.EWOULDBLOCK {
			f.Close()
			return nil, fmt.Errorf("lock %s: %w", path, err)
		}
		select {
		case <-ctx.Done():
			f.Close()
			return nil, ctx.Err()
		case <-time.After(50 * time.Millisecond):
		}
	}
}
