package console

import (
	"context"
	"encoding/json"
	"flag"
	"fmt"
	"net/http"
	"net/http/httptest"
	"strings"
	"sync/atomic"
	"testing"
	"time"

	"github.com/chromedp/chromedp"
	"github.com/chromedp/chromedp/kb"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"stillwater/alert/arming"
	bt "stillwater/cmd/stillwater/internal/console/browsertest"
)

var updateScreens = flag.Bool("update-screens", false, "write the README screenshots into testdata/readme/")

// browserTimeout bounds one browser test, start-up included.
const browserTimeout = 90 * time.Second

const testKey = "correct-horse-battery"

// rig is the page served with a fake backend and the real control API
// acting on the backend's arming, on loopback.
type rig struct {
	fb      *fakeBackend
	srv     *httptest.Server
	refused atomic.Int64
}

func newRig(t *testing.T) *rig {
	t.Helper()
	r := &rig{fb: newFakeBackend(t, time.Now)}
	ctl, err := arming.NewControl(arming.ControlConfig{
		Prefix: "stillwater", Arming: r.fb.arm, Secret: testKey,
		OnRefused: func(string) { r.refused.Add(1) },
		// Short delays after a refusal: the test's next, authorised
		// attempt comes from the same address.
		Throttle: arming.NewThrottle(time.Millisecond, 20*time.Millisecond, nil),
	})
	require.NoError(t, err)
	mux := http.NewServeMux()
	mux.Handle("/control/", ctl.Handler())
	mux.Handle("/", Handler(r.fb, Options{Authorize: bearer(testKey)}))
	r.srv = httptest.NewServer(mux)
	t.Cleanup(r.srv.Close)
	return r
}

func (r *rig) armed(t *testing.T) bool {
	a, _ := r.fb.arm.Armed("deck", time.Now())
	return a
}

// open starts a browser of the given size on the page and waits for the
// camera's first frame.
func (r *rig) open(t *testing.T, w, h int) (ctx context.Context) {
	t.Helper()
	ctx = bt.Start(t, w, h, browserTimeout)
	bt.Do(t, ctx, "open the page", chromedp.Navigate(r.srv.URL+"/"))
	bt.WaitFor(t, ctx, "the first frame", `Number(document.querySelector("#cam-deck img")?.dataset.loads || 0) >= 1`)
	return ctx
}

func TestBrowserFrameShowsAndRefreshes(t *testing.T) {
	r := newRig(t)
	ctx := r.open(t, 1100, 900)
	w := bt.Eval[int](t, ctx, `document.querySelector("#cam-deck img").naturalWidth`)
	assert.Equal(t, fakeFrame[0], w, "the frame is decoded at full size")
	first := bt.Eval[string](t, ctx, `document.querySelector("#cam-deck img").dataset.seq`)
	require.NotEmpty(t, first)
	// The page asks again about once a second: wait for two more frames.
	bt.WaitFor(t, ctx, "a later frame", fmt.Sprintf(`Number(document.querySelector("#cam-deck img").dataset.seq) >= %s + 2`, first))

	// The overlay is drawn over it from the backend's JSON.
	label := bt.Eval[string](t, ctx, `document.querySelector("#cam-deck svg .track-label").textContent`)
	assert.Equal(t, "Track 3: 6.20 m, 2.40 m ALARM", label)
	assert.Equal(t, "0 0 640 360", bt.Eval[string](t, ctx, `document.querySelector("#cam-deck svg").getAttribute("viewBox")`))
	assert.Equal(t, 1, bt.Eval[int](t, ctx, `document.querySelectorAll("#cam-deck svg polygon.zone").length`))
	assert.Contains(t, bt.Eval[string](t, ctx, `document.querySelector("#cam-deck .tracks").innerText`), "4 small changes on the water ignored")
	facts := bt.Eval[string](t, ctx, `document.querySelector("#cam-deck .facts").innerText`)
	for _, want := range []string{"Watching", "12.5 frames a second", "0.1 s", "ARMED", "armed"} {
		assert.Contains(t, facts, want)
	}
	assert.Equal(t, "true", bt.Eval[string](t, ctx, `document.querySelector("#cam-deck").dataset.alarm`), "an alarming track marks the camera")
	assert.Equal(t, "ALARM — stillwater · pool watch", bt.Eval[string](t, ctx, `document.title`), "and the tab's title")
	bt.Screen(t, ctx, *updateScreens, "testdata/readme", "page-desktop.png")
}

func TestBrowserAlarmListedWithSnapshot(t *testing.T) {
	r := newRig(t)
	ctx := r.open(t, 1100, 900)
	bt.WaitFor(t, ctx, "the alarm's snapshot", `document.querySelector('li.event[data-kind="alarm"] img.snap')?.naturalWidth > 0`)
	assert.Equal(t, fakeFrame[0], bt.Eval[int](t, ctx, `document.querySelector('li.event[data-kind="alarm"] img.snap').naturalWidth`))
	text := bt.Eval[string](t, ctx, `document.querySelector('li.event[data-kind="alarm"]').innerText`)
	for _, want := range []string{"Alarm", "camera deck", "Someone in the water while armed.", "6.20 m along, 2.40 m across (track 3)", "Why it was raised", "Body area", "0.210 m²", "38 % darker than the water", "Download the clip"} {
		assert.Contains(t, text, want)
	}
	assert.Equal(t, 2, bt.Eval[int](t, ctx, `document.querySelectorAll("li.event").length`), "the fault is listed too")
	assert.Contains(t, bt.Eval[string](t, ctx, `document.querySelector('li.event[data-kind="fault"]').innerText`), "No frame from the camera for 6.0 s.")
}

func TestBrowserArmingGoesThroughTheControlAPI(t *testing.T) {
	r := newRig(t)
	ctx := r.open(t, 1100, 900)
	require.True(t, r.armed(t), "armed around the clock to begin with")
	assert.True(t, bt.Eval[bool](t, ctx, `document.querySelector('#cam-deck [data-act="disarm"]').disabled`), "read-only without a key")

	// A wrong key: the control API refuses, the page says so, nothing changes.
	bt.Do(t, ctx, "enter a wrong key", chromedp.SendKeys(chromedp.CSS("#key-input"), "guess"), chromedp.Click(chromedp.CSS("#key-use")))
	bt.Do(t, ctx, "click disarm", chromedp.Click(chromedp.CSS(`#cam-deck [data-act="disarm"]`)))
	bt.WaitFor(t, ctx, "the refusal", `document.querySelector("#cam-deck .reply").textContent.includes("Not done")`)
	assert.Contains(t, bt.Eval[string](t, ctx, `document.querySelector("#cam-deck .reply").textContent`), "refused: wrong token")
	assert.True(t, r.armed(t), "a refused disarm changes nothing")
	assert.Equal(t, int64(1), r.refused.Load(), "the refusal is counted by the control API")

	// The right key: disarmed until the time given, then back to schedule.
	bt.Do(t, ctx, "enter the key", chromedp.SendKeys(chromedp.CSS("#key-input"), testKey), chromedp.Click(chromedp.CSS("#key-use")))
	bt.Do(t, ctx, "click disarm", chromedp.Click(chromedp.CSS(`#cam-deck [data-act="disarm"]`)))
	bt.WaitFor(t, ctx, "the disarm", `document.querySelector("#cam-deck .reply").textContent.includes("Done")`)
	assert.False(t, r.armed(t))
	bt.WaitFor(t, ctx, "the page to show it", `document.querySelector("#cam-deck").dataset.armed === "false"`)
	facts := bt.Eval[string](t, ctx, `document.querySelector("#cam-deck .facts").innerText`)
	assert.Contains(t, facts, "DISARMED")
	assert.Contains(t, facts, "set by http:token-holder")
	assert.Contains(t, facts, "Override ends", "the next change is the disarm's end")

	bt.Do(t, ctx, "click back to schedule", chromedp.Click(chromedp.CSS(`#cam-deck [data-act="clear"]`)))
	bt.WaitFor(t, ctx, "the clear", `document.querySelector("#cam-deck .reply").textContent.includes("Back to the schedule")`)
	assert.True(t, r.armed(t))
	assert.Equal(t, int64(1), r.refused.Load())

	assert.Equal(t, testKey, bt.Eval[string](t, ctx, `sessionStorage.getItem("stillwater.control-key")`))
	assert.Equal(t, 0, bt.Eval[int](t, ctx, `localStorage.length`), "the key is never kept beyond the tab")
}

// svgPoint is where, in the viewport, frame pixel (x, y) of the
// calibration editor is.
func svgPoint(t *testing.T, ctx context.Context, x, y float64) (float64, float64) {
	t.Helper()
	xy := bt.Eval[[]float64](t, ctx, fmt.Sprintf(`(() => {
		const p = new DOMPoint(%g, %g).matrixTransform(document.getElementById("calib-svg").getScreenCTM());
		return [p.x, p.y];
	})()`, x, y))
	require.Len(t, xy, 2)
	return xy[0], xy[1]
}

// retype replaces an input's text from the keyboard: select all, type.
func retype(sel, text string) chromedp.Action[chromedp.Void] {
	return func(ctx context.Context, t *chromedp.Target) (chromedp.Void, error) {
		return chromedp.Void{}, chromedp.Do(ctx, chromedp.Focus(chromedp.CSS(sel)),
			chromedp.KeyEvent("a", chromedp.KeyModifiers(chromedp.ModifierCtrl)), chromedp.KeyEvent(text))
	}
}

// solvedFor is a JavaScript condition: the editor shows a preview solved
// for these corners (as clicked), origin and size.
func solvedFor(corners [][2]float64, origin int, length, width float64) string {
	b, _ := json.Marshal(corners)
	return fmt.Sprintf(`document.getElementById("calib-status").dataset.solved === %q`, fmt.Sprintf("%s %d %g %g", b, origin, length, width))
}

func TestBrowserCalibrationByClicking(t *testing.T) {
	r := newRig(t)
	ctx := r.open(t, 1280, 1500)
	bt.Do(t, ctx, "open the editor", chromedp.Click(chromedp.CSS("#cam-deck button.calibrate")))
	bt.WaitFor(t, ctx, "the frozen frame", `document.getElementById("calib").open && document.getElementById("calib-img").naturalWidth === 640`)
	bt.WaitFor(t, ctx, "the current calibration's preview", `document.querySelectorAll("#calib-svg polyline.grid").length > 0`)
	bt.Do(t, ctx, "clear the corners", chromedp.Click(chromedp.CSS("#corners-reset")), chromedp.ScrollIntoView(chromedp.CSS("#calib-svg")))

	clicks := [][2]float64{{120, 295}, {520, 298}, {445, 95}, {195, 92}}
	for _, c := range clicks {
		x, y := svgPoint(t, ctx, c[0], c[1])
		bt.Do(t, ctx, "click a corner", chromedp.MouseClickXY(x, y))
	}
	bt.WaitFor(t, ctx, "the solved preview", solvedFor(clicks, 0, 10, 5))
	got, ok := r.fb.lastPreview()
	require.True(t, ok)
	assert.Equal(t, clicks, got.Corners, "each click lands on the frame pixel under it")
	assert.Equal(t, 17, bt.Eval[int](t, ctx, `document.querySelectorAll("#calib-svg polyline.grid").length`), "the 1 m grid of a 10 m × 5 m pool")
	scale := bt.Eval[string](t, ctx, `document.getElementById("calib-scale").innerText`)
	assert.Regexp(t, `Near end\s+\d\.\d\d cm per pixel \(corner [AB]\)`, scale)
	assert.Regexp(t, `Far end\s+\d+\.\d\d cm per pixel \(corner [CD]\)`, scale)

	// Drag corner 4 ten frame pixels to the right.
	fx, fy := svgPoint(t, ctx, 195, 92)
	tx, ty := svgPoint(t, ctx, 205, 92)
	bt.Do(t, ctx, "drag corner 4", chromedp.DragAndDropXY(fx, fy, tx, ty, 8))
	bt.WaitFor(t, ctx, "the moved corner", `document.getElementById("p-corners-3-x").value === "205"`)
	clicks[3] = [2]float64{205, 92}

	// Type a corner outside the frame: the error shows next to it.
	bt.Do(t, ctx, "type corner 3's x", retype("#p-corners-2-x", "700"))
	bt.WaitFor(t, ctx, "the error beside corner 3", `document.getElementById("err-corners-2").textContent.includes("outside")`)
	assert.Contains(t, bt.Eval[string](t, ctx, `document.getElementById("err-corners-2").textContent`), "corner C (700, 95) is outside the 640×360 frame")
	assert.Equal(t, "", bt.Eval[string](t, ctx, `document.getElementById("err-corners-1").textContent`), "only the corner concerned is marked")
	bt.Do(t, ctx, "type it back", retype("#p-corners-2-x", "445"))
	bt.WaitFor(t, ctx, "the solved preview", solvedFor(clicks, 0, 10, 5)+` && document.getElementById("err-corners-2").textContent === ""`)

	// Trace the water's edge a little inside the corners.
	bt.Do(t, ctx, "switch to the edge", chromedp.Click(chromedp.CSS(`input[name="mode"][value="outline"]`)))
	// Pressing on a corner's handle drags the corner: the edge points
	// keep clear of them.
	edge := [][2]float64{{140, 284}, {500, 286}, {430, 106}, {222, 104}}
	for _, c := range edge {
		x, y := svgPoint(t, ctx, c[0], c[1])
		bt.Do(t, ctx, "click an edge point", chromedp.MouseClickXY(x, y))
	}
	bt.WaitFor(t, ctx, "four edge points", `document.querySelectorAll("#outline-list li").length === 4`)
	assert.Equal(t, 1, bt.Eval[int](t, ctx, `document.querySelectorAll("#calib-svg polygon.edge").length`))

	// The second click is the origin; the pool is 12.5 m × 6 m.
	bt.Do(t, ctx, "set the origin and size",
		chromedp.Focus(chromedp.CSS("#c-origin")), chromedp.KeyEvent(kb.ArrowDown),
		retype("#c-length", "12.5"),
		retype("#c-width", "6"))
	bt.WaitFor(t, ctx, "the preview with the new origin", solvedFor(clicks, 1, 12.5, 6))
	assert.Equal(t, "Point 2 (corner A)", bt.Eval[string](t, ctx, `document.querySelector('#corner-list li[data-i="1"] .xy > span').textContent`))
	assert.True(t, bt.Eval[bool](t, ctx, `document.getElementById("calib-save").disabled`), "no saving without the key")
	bt.Do(t, ctx, "enter the key in the editor", chromedp.SendKeys(chromedp.CSS("#calib-key-input"), testKey), chromedp.Click(chromedp.CSS("#calib-key-use")))
	bt.WaitFor(t, ctx, "the top-down view", `document.getElementById("calib-rect").naturalWidth > 0`)
	bt.Do(t, ctx, "scroll the editor to the top", chromedp.ScrollIntoView(chromedp.CSS("#calib-h")))
	bt.Screen(t, ctx, *updateScreens, "testdata/readme", "page-calibrate.png")
	bt.Do(t, ctx, "save", chromedp.Click(chromedp.CSS("#calib-save")))
	bt.WaitFor(t, ctx, "the save", `document.getElementById("calib-save-reply").textContent.includes("Saved")`)
	saved := r.fb.savedCalibrations()
	require.Len(t, saved, 1)
	want := [][2]float64{clicks[1], clicks[2], clicks[3], clicks[0]}
	assert.Equal(t, CalibrationInput{Corners: want, Outline: edge, Length: 12.5, Width: 6}, saved[0])
}

func TestBrowserPhoneWidth(t *testing.T) {
	r := newRig(t)
	ctx := r.open(t, 375, 812)
	bt.WaitFor(t, ctx, "the events", `document.querySelectorAll("li.event img.snap")[0]?.naturalWidth > 0`)
	assert.Equal(t, 375, bt.Eval[int](t, ctx, `document.documentElement.clientWidth`))
	assert.LessOrEqual(t, bt.HorizontalOverflow(t, ctx), 0.0, "the page scrolls sideways at 375 px")
	bt.Screen(t, ctx, *updateScreens, "testdata/readme", "page-phone.png")

	bt.Do(t, ctx, "open the editor", chromedp.Click(chromedp.CSS("#cam-deck button.calibrate")))
	bt.WaitFor(t, ctx, "the editor", `document.getElementById("calib").open && document.getElementById("calib-img").naturalWidth === 640`)
	bt.WaitFor(t, ctx, "the preview", `document.getElementById("calib-status").dataset.tone === "ok"`)
	assert.LessOrEqual(t, bt.HorizontalOverflow(t, ctx), 0.0, "the calibration editor scrolls sideways at 375 px")
}

func TestBrowserEveryControlHasAName(t *testing.T) {
	r := newRig(t)
	ctx := r.open(t, 1100, 900)
	bt.Do(t, ctx, "open the editor", chromedp.Click(chromedp.CSS("#cam-deck button.calibrate")))
	bt.WaitFor(t, ctx, "the editor's points", `document.querySelectorAll("#corner-list input").length === 8`)
	// The accessible name, as far as the page uses them: aria-label, a
	// label element, aria-labelledby or the text inside.
	unnamed := bt.Eval[[]string](t, ctx, `[...document.querySelectorAll("button, input, select, a[href], textarea, [role=button]")].filter((e) => {
		if (e.type === "hidden") return false;
		const named = (e.getAttribute("aria-label") || "").trim() || (e.labels && [...e.labels].some((l) => l.textContent.trim())) ||
			(e.getAttribute("aria-labelledby") || "").split(" ").some((id) => document.getElementById(id)?.textContent.trim()) || e.textContent.trim();
		return !named;
	}).map((e) => e.outerHTML.slice(0, 80))`)
	assert.Empty(t, unnamed, "controls without an accessible name")
	assert.Greater(t, bt.Eval[int](t, ctx, `document.querySelectorAll("button, input, select").length`), 20, "the check saw the controls")
	neg := bt.Eval[int](t, ctx, `[...document.querySelectorAll("button, input, select, a[href]")].filter((e) => e.tabIndex < 0).length`)
	assert.Zero(t, neg, "every control is in the keyboard's tab order")

	// Keyboard only: Tab to the corner's x field and type into it. The
	// preview of the current calibration comes first: its request could
	// otherwise reach the backend after the typed one's.
	bt.WaitFor(t, ctx, "the current calibration's preview", `document.querySelectorAll("#calib-svg polyline.grid").length > 0`)
	bt.Do(t, ctx, "focus and type", retype("#p-corners-0-x", "100"))
	bt.WaitFor(t, ctx, "the typed corner in a preview", `document.getElementById("p-corners-0-x").value === "100"`)
	bt.WaitFor(t, ctx, "the preview", solvedFor([][2]float64{{100, 300}, {530, 300}, {450, 90}, {190, 90}}, 0, 10, 5))
	got, ok := r.fb.lastPreview()
	require.True(t, ok)
	assert.Equal(t, [2]float64{100, 300}, got.Corners[0], "a corner typed from the keyboard is used")
	assert.True(t, strings.HasPrefix(bt.Eval[string](t, ctx, `document.activeElement.id`), "p-corners-0-x"), "focus stays where the keyboard put it")
}
