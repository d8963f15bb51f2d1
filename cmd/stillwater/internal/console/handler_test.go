package console

import (
	"encoding/json"
	"errors"
	"io"
	"net/http"
	"net/http/httptest"
	"strings"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// fixedNow is the tests' clock: a Wednesday afternoon.
func fixedNow() time.Time { return time.Date(2026, 12, 2, 15, 0, 0, 0, time.UTC) }

// bearer is an Authorize that accepts one token.
func bearer(tok string) func(*http.Request) error {
	return func(r *http.Request) error {
		if r.Header.Get("Authorization") != "Bearer "+tok {
			return &Refusal{Status: http.StatusUnauthorized, Why: "missing or wrong token"}
		}
		return nil
	}
}

func do(t *testing.T, h http.Handler, method, url, body string, hdr map[string]string) *httptest.ResponseRecorder {
	t.Helper()
	var rd io.Reader
	if body != "" {
		rd = strings.NewReader(body)
	}
	req := httptest.NewRequest(method, url, rd)
	for k, v := range hdr {
		req.Header.Set(k, v)
	}
	rec := httptest.NewRecorder()
	h.ServeHTTP(rec, req)
	return rec
}

func TestRoutes(t *testing.T) {
	fb := newFakeBackend(t, fixedNow)
	h := Handler(fb, Options{Now: fixedNow, Notice: "Not a substitute for watching <children>."})
	tests := []struct {
		name, method, url string
		code              int
		ctype             string
		contains          []string
	}{
		{"page", "GET", "/", 200, "text/html; charset=utf-8", []string{`data-api="/console/api/"`, `data-control="/control/"`, "Not a substitute for watching &lt;children&gt;.", "Supplementary only."}},
		{"script", "GET", "/console/app.js", 200, "text/javascript; charset=utf-8", []string{"sessionStorage"}},
		{"style", "GET", "/console/app.css", 200, "text/css; charset=utf-8", []string{":focus-visible"}},
		{"the page is only at the root", "GET", "/index.html", 404, "", nil},
		{"no other asset", "GET", "/console/index.html", 404, "", nil},
		{"no other method", "POST", "/", 405, "", nil},
		{"frame", "GET", "/console/api/cameras/deck/frame.jpg", 200, "image/jpeg", nil},
		{"frame of an unknown camera", "GET", "/console/api/cameras/pier/frame.jpg", 404, "application/json", []string{`no such camera`}},
		{"calibration as it stands", "GET", "/console/api/cameras/deck/calibration", 200, "application/json", []string{`"corners":[[110,300],[530,300],[450,90],[190,90]]`, `"length_m":10`}},
		{"snapshot", "GET", "/console/api/evidence/deck-20261202T101500000Z-track3.jpg", 200, "image/jpeg", nil},
		{"clip", "GET", "/console/api/evidence/deck-20261202T101500000Z-track3.mp4", 200, "video/mp4", nil},
		{"only evidence kinds are served", "GET", "/console/api/evidence/notes.txt", 404, "application/json", []string{"only snapshots and clips"}},
		{"missing evidence says why", "GET", "/console/api/evidence/gone.jpg", 404, "application/json", []string{"retention may have removed it"}},
		{"no climbing out of the evidence", "GET", "/console/api/evidence/..%2f..%2fetc%2fpasswd.jpg", 400, "application/json", []string{"not a file name"}},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			rec := do(t, h, tc.method, tc.url, "", nil)
			assert.Equal(t, tc.code, rec.Code, rec.Body.String())
			if tc.ctype != "" {
				assert.Equal(t, tc.ctype, rec.Header().Get("Content-Type"))
			}
			for _, c := range tc.contains {
				assert.Contains(t, rec.Body.String(), c)
			}
		})
	}
}

func TestPageKeepsToItsOwnOrigin(t *testing.T) {
	h := Handler(newFakeBackend(t, fixedNow), Options{})
	rec := do(t, h, "GET", "/", "", nil)
	csp := rec.Header().Get("Content-Security-Policy")
	assert.Contains(t, csp, "default-src 'self'")
	assert.Contains(t, csp, "frame-ancestors 'none'")
	assert.Contains(t, rec.Body.String(), DefaultNotice, "an empty notice takes the default")
	for _, f := range []string{"static/index.html", "static/app.js", "static/app.css"} {
		b, err := static.ReadFile(f)
		require.NoError(t, err)
		for _, outside := range []string{"http://", "https://", "//cdn", "@import"} {
			s := strings.ReplaceAll(string(b), "http://www.w3.org/2000/svg", "")
			assert.NotContains(t, s, outside, "%s loads something from elsewhere", f)
		}
	}
}

func TestState(t *testing.T) {
	fb := newFakeBackend(t, fixedNow)
	h := Handler(fb, Options{Now: fixedNow})
	rec := do(t, h, "GET", "/console/api/state", "", nil)
	require.Equal(t, 200, rec.Code)
	var st struct {
		Now     time.Time `json:"now"`
		Cameras []struct {
			ID       string  `json:"id"`
			Health   string  `json:"health"`
			Armed    bool    `json:"armed"`
			ArmedWhy string  `json:"armed_why"`
			Faults   []Fault `json:"faults"`
			Overlay  Overlay `json:"overlay"`
		} `json:"cameras"`
		Events []struct {
			Kind        string    `json:"kind"`
			SnapshotURL string    `json:"snapshot_url"`
			ClipURL     string    `json:"clip_url"`
			Why         []Feature `json:"why"`
		} `json:"events"`
	}
	require.NoError(t, json.Unmarshal(rec.Body.Bytes(), &st))
	assert.Equal(t, fixedNow(), st.Now)
	require.Len(t, st.Cameras, 1)
	c := st.Cameras[0]
	assert.Equal(t, "deck", c.ID)
	assert.Equal(t, "watching", c.Health)
	assert.True(t, c.Armed, "arming with no schedule is armed around the clock")
	assert.NotNil(t, c.Faults, "faults is a list, empty when none")
	require.Len(t, c.Overlay.Tracks, 1)
	assert.Equal(t, 6.2, c.Overlay.Tracks[0].X)
	require.Len(t, st.Events, 2)
	assert.Equal(t, "/console/api/evidence/deck-20261202T101500000Z-track3.jpg", st.Events[0].SnapshotURL)
	assert.Equal(t, "/console/api/evidence/deck-20261202T101500000Z-track3.mp4", st.Events[0].ClipURL)
	assert.Len(t, st.Events[0].Why, 3)
	assert.Empty(t, st.Events[1].SnapshotURL)
}

func TestFrameHeaders(t *testing.T) {
	h := Handler(newFakeBackend(t, fixedNow), Options{})
	a := do(t, h, "GET", "/console/api/cameras/deck/frame.jpg", "", nil)
	b := do(t, h, "GET", "/console/api/cameras/deck/frame.jpg", "", nil)
	assert.Equal(t, "1", a.Header().Get("X-Frame-Seq"))
	assert.Equal(t, "2", b.Header().Get("X-Frame-Seq"))
	assert.Equal(t, "no-store", a.Header().Get("Cache-Control"))
	assert.NotEqual(t, a.Body.Bytes(), b.Body.Bytes(), "successive frames differ")
}

func TestGuardCoversTheAPIOnly(t *testing.T) {
	guard := func(next http.Handler) http.Handler {
		return http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
			if r.Header.Get("Authorization") != "Bearer viewer" {
				http.Error(w, "no", http.StatusUnauthorized)
				return
			}
			next.ServeHTTP(w, r)
		})
	}
	h := Handler(newFakeBackend(t, fixedNow), Options{Guard: guard})
	for _, tc := range []struct {
		url  string
		auth string
		code int
	}{
		{"/", "", 200},
		{"/console/app.js", "", 200},
		{"/console/api/state", "", 401},
		{"/console/api/state", "Bearer viewer", 200},
		{"/console/api/cameras/deck/frame.jpg", "", 401},
		{"/console/api/evidence/deck-20261202T101500000Z-track3.jpg", "", 401},
		{"/console/api/evidence/deck-20261202T101500000Z-track3.jpg", "Bearer viewer", 200},
	} {
		t.Run(tc.url+" "+tc.auth, func(t *testing.T) {
			rec := do(t, h, "GET", tc.url, "", map[string]string{"Authorization": tc.auth})
			assert.Equal(t, tc.code, rec.Code)
		})
	}
}

func TestPreviewOrdersCornersFromTheOrigin(t *testing.T) {
	fb := newFakeBackend(t, fixedNow)
	h := Handler(fb, Options{})
	// Clicked starting at C: origin 2 makes the third click corner A.
	clicked := `{"corners":[[450,90],[190,90],[110,300],[530,300]],"origin":2,"length_m":10,"width_m":5}`
	rec := do(t, h, "POST", "/console/api/cameras/deck/calibration/preview", clicked, nil)
	require.Equal(t, 200, rec.Code, rec.Body.String())
	got, ok := fb.lastPreview()
	require.True(t, ok)
	assert.Equal(t, fakeCorners, got.Corners)
	assert.Equal(t, 0, got.Origin)

	var p Preview
	require.NoError(t, json.Unmarshal(rec.Body.Bytes(), &p))
	assert.Len(t, p.Grid, 11+6, "a line every metre across 10 m and 5 m, both sides included")
	// The near side (A, B at y 300) is wider in pixels than the far side
	// (C, D at y 90): fewer metres per pixel near the camera.
	assert.Contains(t, []string{"A", "B"}, p.NearCorner)
	assert.Contains(t, []string{"C", "D"}, p.FarCorner)
	assert.Less(t, p.NearMPP, p.FarMPP)

	// Hand-worked: a camera square above a 10 m × 5 m pool drawn 400 px ×
	// 200 px sees 2.5 cm per pixel everywhere.
	square := `{"corners":[[100,100],[500,100],[500,300],[100,300]],"length_m":10,"width_m":5}`
	rec = do(t, h, "POST", "/console/api/cameras/deck/calibration/preview", square, nil)
	require.Equal(t, 200, rec.Code, rec.Body.String())
	require.NoError(t, json.Unmarshal(rec.Body.Bytes(), &p))
	assert.InDelta(t, 0.025, p.NearMPP, 1e-9)
	assert.InDelta(t, 0.025, p.FarMPP, 1e-9)
	assert.InDelta(t, 140, p.AxisX[len(p.AxisX)-1][0], 1e-9, "1 m along x is 40 px right of A")
	assert.InDelta(t, 140, p.AxisY[len(p.AxisY)-1][1], 1e-9, "1 m along y is 40 px below A")
}

func TestCalibrationErrorsPointAtTheClick(t *testing.T) {
	fb := newFakeBackend(t, fixedNow)
	h := Handler(fb, Options{})
	tests := []struct {
		name, body string
		code       int
		field      string
		point      int
		msg        string
	}{
		{"corner outside, no rotation", `{"corners":[[110,300],[530,300],[700,90],[190,90]],"origin":0,"length_m":10,"width_m":5}`, 422, "corners", 2, "corner C (700, 90) is outside"},
		// Clicked C, D, A, B with origin 2: corner C is the first click.
		{"corner outside, rotated back to the click", `{"corners":[[700,90],[190,90],[110,300],[530,300]],"origin":2,"length_m":10,"width_m":5}`, 422, "corners", 0, "corner C (700, 90) is outside"},
		{"three corners", `{"corners":[[1,1],[2,2],[3,3]],"length_m":10,"width_m":5}`, 422, "corners", -1, "3 corners given"},
		{"origin out of range", `{"corners":[[1,1],[2,2],[3,3],[4,4]],"origin":4,"length_m":10,"width_m":5}`, 422, "origin", -1, "pick one of the 4 corners"},
		{"length from the backend", `{"corners":[[110,300],[530,300],[450,90],[190,90]],"length_m":0,"width_m":5}`, 422, "length_m", -1, "must be positive metres"},
		{"unknown key", `{"corners":[],"length":10}`, 400, "", 0, `unknown field "length"`},
		{"trailing data", `{"corners":[]} {}`, 400, "", 0, "trailing data"},
		{"not JSON", `corners`, 400, "", 0, "send a JSON object"},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			rec := do(t, h, "POST", "/console/api/cameras/deck/calibration/preview", tc.body, nil)
			var e struct {
				Error string `json:"error"`
				Field string `json:"field"`
				Point *int   `json:"point"`
			}
			require.NoError(t, json.Unmarshal(rec.Body.Bytes(), &e))
			assert.Contains(t, e.Error, tc.msg)
			if tc.field != "" {
				assert.Equal(t, tc.code, rec.Code)
				assert.Equal(t, tc.field, e.Field)
				require.NotNil(t, e.Point)
				assert.Equal(t, tc.point, *e.Point)
			} else {
				assert.Equal(t, http.StatusBadRequest, rec.Code, "a malformed request is the client's fault")
			}
		})
	}
}

func TestSaveNeedsAuthorisation(t *testing.T) {
	good := `{"corners":[[110,300],[530,300],[450,92],[190,90]],"origin":0,"length_m":10,"width_m":5}`
	tests := []struct {
		name      string
		authorize func(*http.Request) error
		auth      string
		body      string
		code      int
		saved     int
	}{
		{"not enabled", nil, "Bearer s3cret", good, 403, 0},
		{"no token", bearer("s3cret"), "", good, 401, 0},
		{"wrong token", bearer("s3cret"), "Bearer guess", good, 401, 0},
		{"refused before the body is read", bearer("s3cret"), "Bearer guess", "not json", 401, 0},
		{"right token", bearer("s3cret"), "Bearer s3cret", good, 200, 1},
		{"right token, bad calibration", bearer("s3cret"), "Bearer s3cret", strings.Replace(good, "450,92", "450,920", 1), 422, 0},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			fb := newFakeBackend(t, fixedNow)
			h := Handler(fb, Options{Authorize: tc.authorize})
			rec := do(t, h, "PUT", "/console/api/cameras/deck/calibration", tc.body, map[string]string{"Authorization": tc.auth})
			assert.Equal(t, tc.code, rec.Code, rec.Body.String())
			assert.Len(t, fb.savedCalibrations(), tc.saved)
			if tc.code == 401 {
				assert.Equal(t, `Bearer realm="stillwater"`, rec.Header().Get("WWW-Authenticate"))
			}
		})
	}
}

func TestErrStatus(t *testing.T) {
	for _, tc := range []struct {
		err  error
		code int
	}{
		{ErrNoCamera, 404},
		{errors.Join(errors.New("camera x"), ErrNoCamera), 404},
		{&CalibrationError{Field: "corners", Point: 1, Msg: "m"}, 422},
		{&Refusal{Status: 403, Why: "off"}, 403},
		{errors.New("camera not delivering"), 503},
	} {
		assert.Equal(t, tc.code, errStatus(tc.err), tc.err.Error())
	}
}

func TestOrdered(t *testing.T) {
	c := [][2]float64{{0, 0}, {1, 0}, {1, 1}, {0, 1}}
	for _, tc := range []struct {
		origin int
		first  [2]float64
	}{{0, c[0]}, {1, c[1]}, {2, c[2]}, {3, c[3]}} {
		got := CalibrationInput{Corners: c, Origin: tc.origin}.ordered()
		assert.Equal(t, tc.first, got.Corners[0])
		assert.Equal(t, c[(tc.origin+1)%4], got.Corners[1], "the click after the origin is B")
		assert.Equal(t, 0, got.Origin)
		assert.Equal(t, [2]float64{0, 0}, c[0], "the input is not changed")
	}
}
