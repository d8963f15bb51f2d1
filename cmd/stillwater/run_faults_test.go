package main

import (
	"bufio"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"net"
	"net/http"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"stillwater/alert/arming"
	"stillwater/cmd/stillwater/internal/daemon"
	"stillwater/vision/refdata"
)

// daemonRun is "stillwater run" started by a test, with a JSON log.
type daemonRun struct {
	t      *testing.T
	log    *syncBuffer
	HTTP   string // host:port of the HTTP listener
	BusURL string
	cancel context.CancelFunc
	done   chan error
}

// closedPort returns a loopback address where nothing listens.
func closedPort(t *testing.T) string {
	t.Helper()
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	require.NoError(t, err)
	addr := ln.Addr().String()
	ln.Close()
	return addr
}

// startRun writes config to a file in dir and runs the daemon on it with
// extra flags, waiting until its HTTP listener and bus are up.
func startRun(t *testing.T, dir, config string, flags ...string) *daemonRun {
	t.Helper()
	path := filepath.Join(dir, "stillwater.yaml")
	require.NoError(t, os.WriteFile(path, []byte(config), 0o600))
	ctx, cancel := context.WithCancel(context.Background())
	d := &daemonRun{t: t, log: &syncBuffer{}, cancel: cancel, done: make(chan error, 1)}
	args := append([]string{"run", "-config", path, "-data-dir", filepath.Join(dir, "data")}, flags...)
	go func() { d.done <- run(ctx, args, io.Discard, d.log) }()
	require.Eventually(t, func() bool {
		for _, l := range d.lines() {
			switch l["msg"] {
			case "http listening":
				d.HTTP, _ = l["addr"].(string)
			case "embedded bus started":
				d.BusURL, _ = l["url"].(string)
			}
		}
		select {
		case err := <-d.done:
			d.done <- err
			t.Fatalf("daemon ended before it was ready: %v\n%s", err, d.log.String())
		default:
		}
		return d.HTTP != "" && d.BusURL != ""
	}, 20*time.Second, 20*time.Millisecond, "daemon not ready")
	t.Cleanup(func() { d.stop() })
	return d
}

// lines parses the JSON log so far.
func (d *daemonRun) lines() []map[string]any {
	var out []map[string]any
	sc := bufio.NewScanner(strings.NewReader(d.log.String()))
	sc.Buffer(make([]byte, 1<<20), 1<<20)
	for sc.Scan() {
		var m map[string]any
		if json.Unmarshal(sc.Bytes(), &m) == nil {
			out = append(out, m)
		}
	}
	return out
}

// waitLog waits for a log line for which match is true and returns it.
func (d *daemonRun) waitLog(match func(map[string]any) bool, within time.Duration) map[string]any {
	d.t.Helper()
	var got map[string]any
	require.Eventually(d.t, func() bool {
		for _, l := range d.lines() {
			if match(l) {
				got = l
				return true
			}
		}
		return false
	}, within, 20*time.Millisecond, "log line not seen; log:\n%s", d.log.String())
	return got
}

func (d *daemonRun) stop() error {
	d.cancel()
	select {
	case err := <-d.done:
		d.done <- err
		return err
	case <-time.After(20 * time.Second):
		d.t.Error("daemon did not stop within 20 s")
		return nil
	}
}

// httpDo sends one request with an optional bearer token.
func httpDo(t *testing.T, method, url, token, body string) int {
	t.Helper()
	req, err := http.NewRequest(method, url, strings.NewReader(body))
	require.NoError(t, err)
	if token != "" {
		req.Header.Set("Authorization", "Bearer "+token)
	}
	res, err := http.DefaultClient.Do(req)
	require.NoError(t, err)
	io.Copy(io.Discard, res.Body)
	res.Body.Close()
	return res.StatusCode
}

// faultCamera is a camera section whose RTSP source refuses every
// connection, so that its open fails again and again.
func faultCamera(id, source string) string {
	return fmt.Sprintf(`
  - id: %s
    source: %q
    pool: {length_m: 8, width_m: 4}
    corners: [[145, 390], [229, 42], [420, 42], [500, 390]]
`, id, source)
}

// A camera password in the URL's query string, from ${NAME}: it must not
// appear in any log line (JSON log) of a camera whose open keeps failing
// and which is reported lost, nor in any message on the bus.
func TestQueryStringPasswordNeverPrinted(t *testing.T) {
	const secret = "Qs7-hunter2-pw"
	t.Setenv("SW_TEST_CAM_PW", secret)
	dir := t.TempDir()
	src := "rtsp://" + closedPort(t) + "/stream1?user=admin&pwd=${SW_TEST_CAM_PW}"
	cfg := "log: {format: json, level: debug}\nbus: {listen: 127.0.0.1:-1}\ncameras:" + faultCamera("pool", src)
	d := startRun(t, dir, cfg, "-http", "127.0.0.1:0")

	nc, err := nats.Connect(d.BusURL)
	require.NoError(t, err)
	defer nc.Close()
	var mu sync.Mutex
	var bus []string
	_, err = nc.Subscribe("stillwater.>", func(m *nats.Msg) {
		mu.Lock()
		bus = append(bus, string(m.Data))
		mu.Unlock()
	})
	require.NoError(t, err)
	require.NoError(t, nc.Flush())

	d.waitLog(func(l map[string]any) bool { return l["msg"] == "camera open failed; trying again" }, 10*time.Second)
	d.waitLog(func(l map[string]any) bool { return l["fault"] == "camera_lost" }, 10*time.Second)
	require.Eventually(t, func() bool {
		mu.Lock()
		defer mu.Unlock()
		for _, m := range bus {
			if strings.Contains(m, `"camera_lost"`) {
				return true
			}
		}
		return false
	}, 10*time.Second, 20*time.Millisecond, "no camera_lost on the bus")
	require.NoError(t, d.stop())

	logs := d.log.String()
	assert.NotContains(t, logs, secret, "the password reached the log")
	assert.Contains(t, logs, "pwd=xxxxx", "the source is still shown, password masked")
	mu.Lock()
	defer mu.Unlock()
	for _, m := range bus {
		assert.NotContains(t, m, secret, "the password reached the bus")
	}
	refdata.Report(t, "query-string password: %d log lines and %d bus message(s) of a failing camera, none with the password", len(d.lines()), len(bus))
}

// Camera ids that would break subjects or evidence file names are refused
// by run as they are by check, naming the field.
func TestRunRefusesUnsafeCameraIDs(t *testing.T) {
	for name, id := range map[string]string{
		"long":  strings.Repeat("p", 65),
		"slash": "pool/north",
	} {
		t.Run(name, func(t *testing.T) {
			dir := t.TempDir()
			path := filepath.Join(dir, "stillwater.yaml")
			cfg := "bus: {listen: 127.0.0.1:-1}\ncameras:" + faultCamera(fmt.Sprintf("%q", id), "rtsp://"+closedPort(t)+"/a")
			require.NoError(t, os.WriteFile(path, []byte(cfg), 0o600))
			ctx, cancel := context.WithTimeout(context.Background(), 5*time.Second)
			defer cancel()
			err := run(ctx, []string{"run", "-config", path, "-data-dir", filepath.Join(dir, "data"), "-http", "127.0.0.1:0"}, io.Discard, io.Discard)
			require.Error(t, err, "run must refuse the id before starting")
			assert.Contains(t, err.Error(), "cameras[0].id")
		})
	}
}

// SIGHUP with a new control secret, a new viewer secret and settings that
// need a restart: the old tokens are refused at once, the new ones work,
// and the reload line names every setting waiting for a restart. The
// listener is not loopback, so pictures need a token.
func TestReloadRotatesSecrets(t *testing.T) {
	dir := t.TempDir()
	ctlFile, viewFile := filepath.Join(dir, "control.token"), filepath.Join(dir, "viewer.token")
	require.NoError(t, os.WriteFile(ctlFile, []byte("old-control\n"), 0o600))
	require.NoError(t, os.WriteFile(viewFile, []byte("old-viewer\n"), 0o600))
	cam := faultCamera("pool", "rtsp://"+closedPort(t)+"/a")
	cfg := func(beat string, files int) string {
		return fmt.Sprintf("log: {format: json}\nbus: {listen: 127.0.0.1:-1}\nhttp: {viewer_secret_file: %s}\ncontrol: {secret_file: %s, token_name: owner}\nheartbeat_every: %s\nevidence: {max_files: %d}\ncameras:%s",
			viewFile, ctlFile, beat, files, cam)
	}
	d := startRun(t, dir, cfg("10s", 200), "-http", "0.0.0.0:0")
	_, port, err := net.SplitHostPort(d.HTTP)
	require.NoError(t, err)
	base := "http://127.0.0.1:" + port

	assert.Equal(t, http.StatusOK, httpDo(t, "POST", base+"/control/arm", "old-control", `{"camera":"pool"}`))
	// The gate comes before the camera lookup: 404 for a camera that is
	// not there means the token was accepted.
	assert.Equal(t, http.StatusUnauthorized, httpDo(t, "GET", base+"/cameras/pool/latest.jpg", "", ""), "a picture without a token on a non-loopback listener")
	assert.Equal(t, http.StatusNotFound, httpDo(t, "GET", base+"/cameras/nosuch/latest.jpg", "old-viewer", ""))
	assert.Equal(t, http.StatusNotFound, httpDo(t, "GET", base+"/cameras/nosuch/latest.jpg", "old-control", ""), "the control token opens pictures too")

	require.NoError(t, os.WriteFile(ctlFile, []byte("new-control\n"), 0o600))
	require.NoError(t, os.WriteFile(viewFile, []byte("new-viewer\n"), 0o600))
	require.NoError(t, os.WriteFile(filepath.Join(dir, "stillwater.yaml"), []byte(cfg("20s", 50)), 0o600))
	require.NoError(t, syscall.Kill(os.Getpid(), syscall.SIGHUP))
	line := d.waitLog(func(l map[string]any) bool { return l["msg"] == "configuration reloaded" }, 10*time.Second)

	assert.Equal(t, http.StatusUnauthorized, httpDo(t, "POST", base+"/control/arm", "old-control", `{"camera":"pool"}`), "the old control token must be refused at once")
	assert.Equal(t, http.StatusOK, httpDo(t, "POST", base+"/control/arm", "new-control", `{"camera":"pool"}`))
	assert.Equal(t, http.StatusUnauthorized, httpDo(t, "GET", base+"/cameras/nosuch/latest.jpg", "old-viewer", ""))
	time.Sleep(arming.DefaultRefusalBase) // the refusal above slows this client's next attempt
	assert.Equal(t, http.StatusNotFound, httpDo(t, "GET", base+"/cameras/nosuch/latest.jpg", "new-viewer", ""))

	t.Logf("reload line: applied=%v tokens=%v restart_needed=%v", line["applied"], line["tokens"], line["restart_needed"])
	assert.Equal(t, "changed", line["tokens"])
	restart := fmt.Sprint(line["restart_needed"])
	assert.Contains(t, restart, "heartbeat_every")
	assert.Contains(t, restart, "evidence.max_files")
	assert.NotContains(t, restart, "control")
	assert.Contains(t, d.log.String(), `"by":"http:owner"`)
	assert.NotContains(t, d.log.String(), "old-control")
	assert.NotContains(t, d.log.String(), "new-control")
}

// A client that sends wrong tokens again and again is answered later and
// later; the delays are measured through the daemon's HTTP listener.
func TestRepeatedBadTokensSlowed(t *testing.T) {
	dir := t.TempDir()
	t.Setenv("SW_TEST_CONTROL", "right-token")
	cfg := "log: {format: json}\nbus: {listen: 127.0.0.1:-1}\ncontrol: {secret_env: SW_TEST_CONTROL}\ncameras:" + faultCamera("pool", "rtsp://"+closedPort(t)+"/a")
	d := startRun(t, dir, cfg, "-http", "127.0.0.1:0")
	var took []time.Duration
	var sent, answered []time.Time
	for i := 0; i < 5; i++ {
		t0 := time.Now()
		require.Equal(t, http.StatusUnauthorized, httpDo(t, "POST", "http://"+d.HTTP+"/control/disarm", "wrong", `{"for":"1h"}`))
		sent, answered = append(sent, t0), append(answered, time.Now())
		took = append(took, answered[i].Sub(t0))
	}
	// Lower bounds only, which a loaded machine cannot break (a timer
	// never fires early): after n refusals the next attempt is judged no
	// sooner than base·2^(n−1) after the last refusal, which came after
	// the last attempt was sent.
	for i := 1; i < len(took); i++ {
		want := arming.DefaultRefusalBase << (i - 1)
		assert.GreaterOrEqual(t, answered[i].Sub(sent[i-1]), want, "attempt %d after %d refusals", i+1, i)
	}
	refdata.Report(t, "five wrong control tokens in a row answered after %v", roundAll(took))
}

func roundAll(ds []time.Duration) []time.Duration {
	out := make([]time.Duration, len(ds))
	for i, d := range ds {
		out[i] = d.Round(time.Millisecond)
	}
	return out
}

// Slow clients: half-sent headers, a half-sent body and an idle
// keep-alive connection are all cut by the listener's timeouts, and the
// daemon keeps answering others meanwhile.
func TestHTTPCutsSlowClients(t *testing.T) {
	if testing.Short() {
		t.Skip("waits for the HTTP timeouts (about 10 s)")
	}
	dir := t.TempDir()
	cfg := "log: {format: json}\nbus: {listen: 127.0.0.1:-1}\ncameras:" + faultCamera("pool", "rtsp://"+closedPort(t)+"/a")
	d := startRun(t, dir, cfg, "-http", "127.0.0.1:0")
	to := daemon.DefaultHTTPTimeouts()

	// cutAfter opens a connection, sends what, and returns how long until
	// the server closes it (or limit).
	cutAfter := func(what string, limit time.Duration) time.Duration {
		c, err := net.Dial("tcp", d.HTTP)
		require.NoError(t, err)
		defer c.Close()
		t0 := time.Now()
		_, err = io.WriteString(c, what)
		require.NoError(t, err)
		c.SetReadDeadline(t0.Add(limit))
		io.Copy(io.Discard, c) // until EOF, reset or the limit
		return time.Since(t0)
	}
	const slowHeaders = 200
	type result struct {
		kind string
		d    time.Duration
	}
	results := make(chan result, slowHeaders+2)
	limit := to.Read + to.Idle + 5*time.Second
	for i := 0; i < slowHeaders; i++ {
		go func() { results <- result{"header", cutAfter("GET /healthz HTTP/1.1\r\nHost: x\r\n", limit)} }()
	}
	go func() {
		results <- result{"body", cutAfter("POST /control/arm HTTP/1.1\r\nHost: x\r\nContent-Length: 100\r\n\r\n{\"cam", limit)}
	}()
	go func() {
		results <- result{"idle", cutAfter("GET /healthz HTTP/1.1\r\nHost: x\r\n\r\n", limit)}
	}()
	time.Sleep(500 * time.Millisecond)
	assert.Equal(t, http.StatusOK, httpDo(t, "GET", "http://"+d.HTTP+"/healthz", "", ""), "others are served while slow clients hang")

	worst := map[string]time.Duration{}
	for i := 0; i < slowHeaders+2; i++ {
		r := <-results
		worst[r.kind] = max(worst[r.kind], r.d)
	}
	slack := 2 * time.Second
	assert.Less(t, worst["header"], to.ReadHeader+slack, "half-sent headers")
	assert.Less(t, worst["body"], to.Read+slack, "half-sent body")
	assert.Less(t, worst["idle"], to.Idle+slack, "idle keep-alive connection")
	refdata.Report(t, "slow HTTP clients cut: %d half-sent headers within %v (read_header %v), half-sent body after %v (read %v), idle connection after %v (idle %v)",
		slowHeaders, worst["header"].Round(10*time.Millisecond), to.ReadHeader, worst["body"].Round(10*time.Millisecond), to.Read,
		worst["idle"].Round(10*time.Millisecond), to.Idle)
}
