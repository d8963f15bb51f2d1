package main

import (
	"bytes"
	"context"
	"flag"
	"fmt"
	"io"
	"log/slog"
	"net/http"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/chromedp/chromedp"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	"gopkg.in/yaml.v3"

	"github.com/prometheus/client_golang/prometheus"
	"stillwater/cmd/stillwater/internal/config"
	bt "stillwater/cmd/stillwater/internal/console/browsertest"
	"stillwater/cmd/stillwater/internal/daemon"
	"stillwater/cmd/stillwater/internal/testkit"
	"stillwater/cmd/stillwater/internal/tuning"
)

// lockedBuffer is a log sink the test reads while the daemon writes.
type lockedBuffer struct {
	mu sync.Mutex
	b  bytes.Buffer
}

func (l *lockedBuffer) Write(p []byte) (int, error) {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.b.Write(p)
}

func (l *lockedBuffer) String() string {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.b.String()
}

const pageKey = "page-test-control-key"

// pageDaemon is the daemon started from a configuration file, as run
// starts it, watching a generated clip of a child entering the pool.
type pageDaemon struct {
	url, cfgFile, clip string
	reg                *prometheus.Registry
	logs               *lockedBuffer
}

func startPageDaemon(t *testing.T) pageDaemon {
	t.Helper()
	truth, clip, dir := renderScene(t, "child", 7, tuning.FloatingChild)
	var corners []string
	for _, c := range truth.Corners {
		corners = append(corners, fmt.Sprintf("[%g, %g]", c.Pixel[0], c.Pixel[1]))
	}
	cfgFile := filepath.Join(dir, "stillwater.yaml")
	// The clip plays at its own pace, looped, as a camera would deliver it.
	src := fmt.Sprintf(`# written by the page test
data_dir: %s
http: {listen: "127.0.0.1:0"}
bus: {listen: "127.0.0.1:-1"}
control: {secret: %s}
cameras:
  - id: demo
    source: %s
    realtime: true
    loop: true
    pool: {length_m: %g, width_m: %g}
    camera_position: {x_m: %g, y_m: %g, height_m: %g}
    corners: [%s]
    zones:
      - {name: steps, pool_m: [[7.5, 3.5], [7.9, 3.5], [7.9, 3.9]]}
`, filepath.Join(dir, "data"), pageKey, clip, truth.Pool.Length, truth.Pool.Width, truth.Camera.X, truth.Camera.Y, truth.Camera.Height, strings.Join(corners, ", "))
	require.NoError(t, os.WriteFile(cfgFile, []byte(src), 0o644))
	load := func() (config.Config, error) {
		c, err := config.LoadConfig(cfgFile)
		if err != nil {
			return c, err
		}
		return c, c.Validate()
	}
	cfg, err := load()
	require.NoError(t, err)

	d := pageDaemon{cfgFile: cfgFile, clip: clip, reg: prometheus.NewRegistry(), logs: &lockedBuffer{}}
	reload := make(chan config.Config, 1)
	ctx, cancel := context.WithCancel(context.Background())
	ready := make(chan string, 1)
	done := make(chan error, 1)
	go func() {
		done <- daemon.Serve(ctx, cfg, daemon.Deps{
			Log: slog.New(slog.NewTextHandler(d.logs, nil)), Registry: d.reg,
			Ready:  func(_, httpAddr string) { ready <- httpAddr },
			Reload: reload, ConfigFile: cfgFile, LoadConfig: load,
			// As run's SIGHUP path: read the file again and hand it over.
			Reread: func() {
				c, err := load()
				if err != nil {
					t.Errorf("reread: %v", err)
					return
				}
				reload <- c
			},
		})
	}()
	select {
	case addr := <-ready:
		d.url = "http://" + addr
	case err := <-done:
		cancel()
		t.Fatalf("daemon ended before it was ready: %v\n%s", err, d.logs)
	case <-time.After(20 * time.Second):
		cancel()
		t.Fatal("daemon not ready within 20 s")
	}
	t.Cleanup(func() {
		cancel()
		select {
		case <-done:
		case <-time.After(20 * time.Second):
			t.Error("daemon did not stop within 20 s")
		}
	})
	return d
}

// TestPageOnTheDaemon opens the page of a running daemon in a browser:
// the camera's frame, the alarm the clip's child raises with its
// snapshot and features, arming through the control API, and a
// calibration clicked on the page that equals stillwater calibrate's for
// the same points and is reloaded without a restart.
func TestPageOnTheDaemon(t *testing.T) {
	ctx := bt.Start(t, 1280, 1500, 3*time.Minute) // skips at once without a browser
	d := startPageDaemon(t)
	bt.Do(t, ctx, "open the page", chromedp.Navigate(d.url+"/"))

	t.Run("frame shows and refreshes", func(t *testing.T) {
		bt.WaitFor(t, ctx, "the first frame", `Number(document.querySelector("#cam-demo img")?.dataset.loads || 0) >= 1`)
		first := bt.Eval[int](t, ctx, `Number(document.querySelector("#cam-demo img").dataset.seq)`)
		bt.WaitFor(t, ctx, "a later frame", fmt.Sprintf(`Number(document.querySelector("#cam-demo img").dataset.seq) > %d`, first))
		assert.Positive(t, bt.Eval[int](t, ctx, `document.querySelector("#cam-demo img").naturalWidth`))
		bt.WaitFor(t, ctx, "the water outline", `document.querySelectorAll("#cam-demo svg polygon.outline").length === 1`)
		facts := bt.Eval[string](t, ctx, `document.querySelector("#cam-demo .facts").innerText`)
		assert.Contains(t, facts, "Watching")
		assert.Contains(t, facts, "ARMED")
		assert.Regexp(t, `\d+\.\d frames a second`, facts)
		bt.WaitFor(t, ctx, "the alarm's track", `[...document.querySelectorAll("#cam-demo svg .track-label")].some((e) => e.textContent.endsWith("ALARM"))`)
		// The ripples' tracks are counted, not drawn.
		assert.Less(t, bt.Eval[int](t, ctx, `document.querySelectorAll("#cam-demo svg .track-label").length`), 4)
	})

	t.Run("alarm with snapshot and why", func(t *testing.T) {
		bt.WaitFor(t, ctx, "the child's alarm with its snapshot", `document.querySelector('li.event[data-kind="alarm"] img.snap')?.naturalWidth > 0`)
		text := bt.Eval[string](t, ctx, `document.querySelector('li.event[data-kind="alarm"]').innerText`)
		assert.Contains(t, text, "Someone in the water while armed")
		assert.Contains(t, text, "Why it was raised")
		assert.Contains(t, text, "Body area")
		assert.Regexp(t, `Position: \d+\.\d\d m along, \d+\.\d\d m across`, text)
		bt.Screen(t, ctx, *updatePageScreens, "testdata/readme", "page-daemon.png")
	})

	t.Run("arming through the control API", func(t *testing.T) {
		refused := func() float64 {
			v, _ := testkit.MetricValue(t, d.reg, "stillwater_control_refused_total", map[string]string{"via": "http"})
			return v
		}
		before := refused()
		bt.Do(t, ctx, "a wrong key", chromedp.SendKeys(chromedp.CSS("#key-input"), "guess"), chromedp.Click(chromedp.CSS("#key-use")))
		bt.Do(t, ctx, "disarm", chromedp.Click(chromedp.CSS(`#cam-demo [data-act="disarm"]`)))
		bt.WaitFor(t, ctx, "the refusal", `document.querySelector("#cam-demo .reply").textContent.includes("Not done")`)
		assert.Equal(t, before+1, refused(), "counted as any refused control request")
		assert.True(t, controlArmed(t, d.url), "still armed")

		bt.Do(t, ctx, "the key", chromedp.SendKeys(chromedp.CSS("#key-input"), pageKey), chromedp.Click(chromedp.CSS("#key-use")))
		bt.Do(t, ctx, "disarm", chromedp.Click(chromedp.CSS(`#cam-demo [data-act="disarm"]`)))
		bt.WaitFor(t, ctx, "the disarm", `document.querySelector("#cam-demo .reply").textContent.includes("Done")`)
		assert.False(t, controlArmed(t, d.url))
		bt.Do(t, ctx, "back to schedule", chromedp.Click(chromedp.CSS(`#cam-demo [data-act="clear"]`)))
		bt.WaitFor(t, ctx, "the clear", `document.querySelector("#cam-demo .reply").textContent.includes("Back to the schedule")`)
		assert.True(t, controlArmed(t, d.url))
	})

	t.Run("calibration by clicking equals the CLI's", func(t *testing.T) {
		bt.Do(t, ctx, "open the editor", chromedp.Click(chromedp.CSS("#cam-demo button.calibrate")))
		bt.WaitFor(t, ctx, "the frozen frame", `document.getElementById("calib").open && document.getElementById("calib-img").naturalWidth > 0`)
		bt.WaitFor(t, ctx, "the running calibration's preview", `document.getElementById("calib-status").dataset.tone === "ok"`)
		// Click 3 px off each configured corner, so that the saved
		// calibration is the page's, not the file's.
		cur, err := config.LoadConfig(d.cfgFile)
		require.NoError(t, err)
		var clicks [][2]float64
		for _, c := range cur.Cameras[0].Corners {
			clicks = append(clicks, [2]float64{float64(int(c[0])) + 3, float64(int(c[1])) - 3})
		}
		bt.Do(t, ctx, "clear the corners", chromedp.Click(chromedp.CSS("#corners-reset")), chromedp.ScrollIntoView(chromedp.CSS("#calib-svg")))
		for _, c := range clicks {
			xy := bt.Eval[[]float64](t, ctx, fmt.Sprintf(`(() => { const p = new DOMPoint(%g, %g).matrixTransform(document.getElementById("calib-svg").getScreenCTM()); return [p.x, p.y]; })()`, c[0], c[1]))
			bt.Do(t, ctx, "click a corner", chromedp.MouseClickXY(xy[0], xy[1]))
		}
		bt.WaitFor(t, ctx, "the preview of the clicks", fmt.Sprintf(`document.querySelectorAll("#corner-list li").length === 4 && document.getElementById("calib-status").dataset.tone === "ok" && document.getElementById("calib-rect").naturalWidth > 0 && document.getElementById("p-corners-3-x").value === "%g"`, clicks[3][0]))
		// A pool too short for the zone in the file: the calibration
		// solves, but the whole file does not validate, so nothing changes.
		before, err := os.ReadFile(d.cfgFile)
		require.NoError(t, err)
		bt.Do(t, ctx, "a 5 m pool", retypeKeys("#c-length", "5"))
		bt.WaitFor(t, ctx, "its preview", `document.getElementById("calib-status").dataset.tone === "ok" && document.getElementById("calib-status").dataset.solved.includes(" 5 4")`)
		bt.Do(t, ctx, "save", chromedp.Click(chromedp.CSS("#calib-save")))
		bt.WaitFor(t, ctx, "the refusal", `document.getElementById("calib-save-reply").textContent.includes("Not saved")`)
		assert.Contains(t, bt.Eval[string](t, ctx, `document.getElementById("calib-save-reply").textContent`), "zones[0]")
		after, err := os.ReadFile(d.cfgFile)
		require.NoError(t, err)
		assert.Equal(t, string(before), string(after), "the file is put back as it was")

		bt.Do(t, ctx, "the 8 m pool", retypeKeys("#c-length", "8"))
		bt.WaitFor(t, ctx, "its preview", `document.getElementById("calib-status").dataset.solved?.includes(" 8 4")`)
		bt.Do(t, ctx, "save", chromedp.Click(chromedp.CSS("#calib-save")))
		bt.WaitFor(t, ctx, "the save", `document.getElementById("calib-save-reply").textContent.includes("Saved")`)

		saved, err := config.LoadConfig(d.cfgFile)
		require.NoError(t, err)
		page := saved.Cameras[0].CalibrationConfig
		assert.Equal(t, clicks, page.Corners, "the corners as clicked")

		// stillwater calibrate on the same frame size and points. Its
		// homography is checked against OpenCV's findHomography in
		// homography/opencv_test.go.
		var cli bytes.Buffer
		args := []string{"-frame", d.clip, "-corners", pairs(clicks), "-length", fmt.Sprint(page.Pool.Length), "-width", fmt.Sprint(page.Pool.Width),
			"-camera", fmt.Sprintf("%g,%g,%g", page.CameraPosition.X, page.CameraPosition.Y, page.CameraPosition.Height)}
		require.NoError(t, runCalibrate(context.Background(), args, &cli, io.Discard))
		var cliCfg config.CalibrationConfig
		require.NoError(t, yaml.Unmarshal(cli.Bytes(), &cliCfg))
		assert.Equal(t, cliCfg.Corners, page.Corners)
		assert.Equal(t, cliCfg.Pool, page.Pool)
		assert.Equal(t, cliCfg.Frame, page.Frame)
		a, err := config.BuildCalibration(cliCfg)
		require.NoError(t, err)
		b, err := config.BuildCalibration(page)
		require.NoError(t, err)
		ha, hb := a.ToPlane().Normalized(), b.ToPlane().Normalized()
		for i := range ha {
			assert.InDelta(t, ha[i], hb[i], 1e-9, "homography element %d", i)
		}
		assert.FileExists(t, page.ReferenceFrame, "the frame kept for the camera-moved check")
		prev, err := filepath.Glob(d.cfgFile + ".prev-*")
		require.NoError(t, err)
		require.NotEmpty(t, prev, "the file as it was is kept")
		old, err := os.ReadFile(prev[len(prev)-1])
		require.NoError(t, err)
		assert.Contains(t, string(old), "# written by the page test")

		// Reloaded without a restart: the camera took its new calibration.
		require.Eventually(t, func() bool {
			return strings.Contains(d.logs.String(), "calibration, zones, gating and alarm timing reloaded")
		}, 20*time.Second, 100*time.Millisecond, "the camera did not reload")
		bt.Do(t, ctx, "scroll the editor to the top", chromedp.ScrollIntoView(chromedp.CSS("#calib-h")))
		bt.Screen(t, ctx, *updatePageScreens, "testdata/readme", "page-daemon-calibrate.png")
	})
}

var updatePageScreens = flag.Bool("update-screens", false, "write the page's README screenshots into testdata/readme/")

// retypeKeys replaces an input's text from the keyboard.
func retypeKeys(sel, text string) chromedp.Action[chromedp.Void] {
	return func(ctx context.Context, t *chromedp.Target) (chromedp.Void, error) {
		return chromedp.Void{}, chromedp.Do(ctx, chromedp.Focus(chromedp.CSS(sel)),
			chromedp.KeyEvent("a", chromedp.KeyModifiers(chromedp.ModifierCtrl)), chromedp.KeyEvent(text))
	}
}

// pairs writes points as stillwater calibrate's -corners takes them.
func pairs(ps [][2]float64) string {
	var s []string
	for _, p := range ps {
		s = append(s, fmt.Sprintf("%g,%g", p[0], p[1]))
	}
	return strings.Join(s, " ")
}

// controlArmed asks the control API whether camera demo is armed.
func controlArmed(t *testing.T, url string) bool {
	t.Helper()
	resp, err := http.Get(url + "/control/status")
	require.NoError(t, err)
	defer resp.Body.Close()
	b, err := io.ReadAll(resp.Body)
	require.NoError(t, err)
	return strings.Contains(string(b), `"camera":"demo","armed":true`)
}
