package alert

import (
	"bytes"
	"context"
	"encoding/json"
	"net"
	"net/http"
	"net/http/httptest"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

func TestEmbeddedDefaultsToLoopback(t *testing.T) {
	opts, err := embeddedOptions(EmbeddedConfig{Listen: ":4222", MQTT: ":1883"})
	require.NoError(t, err)
	assert.Equal(t, "127.0.0.1", opts.Host)
	assert.Equal(t, "127.0.0.1", opts.MQTT.Host)
	assert.Equal(t, 1883, opts.MQTT.Port)
	opts, err = embeddedOptions(EmbeddedConfig{})
	require.NoError(t, err)
	assert.Equal(t, "127.0.0.1", opts.Host)
	assert.Zero(t, opts.MQTT.Port, "MQTT is off unless asked for")
}

func TestEmbeddedConfigErrors(t *testing.T) {
	cases := []struct {
		name string
		cfg  EmbeddedConfig
		want string
	}{
		{"bad port", EmbeddedConfig{Listen: "127.0.0.1:nats"}, "listen"},
		{"bad role", EmbeddedConfig{Prefix: "sw", Users: []BusUser{{Name: "a", Password: "p", Role: "admin"}}}, `role "admin"`},
		{"no password", EmbeddedConfig{Prefix: "sw", Users: []BusUser{{Name: "a", Role: RoleDaemon}}}, "users[0]"},
		{"twice", EmbeddedConfig{Prefix: "sw", Users: []BusUser{{"a", "p", RoleDaemon}, {"a", "q", RoleOperator}}}, "used twice"},
		{"no prefix", EmbeddedConfig{Users: []BusUser{{"a", "p", RoleDaemon}}}, "prefix"},
		{"leaf no url", EmbeddedConfig{Leaf: []LeafRemote{{}}}, "leaf[0]: no urls"},
		{"leaf creds", EmbeddedConfig{Leaf: []LeafRemote{{URLs: []string{"nats-leaf://h:7422"}, CredsFile: "/nonexistent/x.creds"}}}, "creds file"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			_, err := embeddedOptions(c.cfg)
			require.Error(t, err)
			assert.Contains(t, err.Error(), c.want)
		})
	}
}

// TestMQTTSubscriberGetsTarget checks the MQTT bridge with Debian's
// mosquitto_sub (mosquitto-clients): NATS subject a.b.c is MQTT topic
// a/b/c, as nats-server's MQTT documentation describes.
func TestMQTTSubscriberGetsTarget(t *testing.T) {
	bin, err := exec.LookPath("mosquitto_sub")
	if err != nil {
		t.Skip("mosquitto_sub not installed (Debian package mosquitto-clients)")
	}
	mport := freePort(t)
	emb, err := StartEmbedded(EmbeddedConfig{Listen: "127.0.0.1:-1", MQTT: "127.0.0.1:" + strconv.Itoa(mport), StoreDir: t.TempDir(), Name: "mqtt"})
	require.NoError(t, err)
	defer emb.Shutdown()
	nc := connect(t, emb.URL())
	p, err := NewPublisher(context.Background(), nc, "stillwater", StreamConfig{})
	require.NoError(t, err)
	defer p.Close()

	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	var out, errb bytes.Buffer
	cmd := exec.CommandContext(ctx, bin, "-h", "127.0.0.1", "-p", strconv.Itoa(mport), "-t", "stillwater/north/target", "-C", "1", "-W", "20", "-i", "stillwater-test")
	cmd.Stdout, cmd.Stderr = &out, &errb
	require.NoError(t, cmd.Start())
	exited := make(chan error, 1)
	go func() { exited <- cmd.Wait() }()
	// The MQTT subscription is made some time after the process starts and
	// cannot be observed from here; publish the same message (one id, so
	// the stream keeps one copy) until mosquitto_sub has printed it.
	msg := targetJSON(t, "north", 1, "start")
	tick := time.NewTicker(200 * time.Millisecond)
	defer tick.Stop()
	for done := false; !done; {
		require.NoError(t, p.Publish(ctx, "north", KindTarget, "mqtt-1", msg))
		select {
		case err = <-exited:
			done = true
		case <-tick.C:
		}
	}
	require.NoError(t, err, "mosquitto_sub: %s", errb.String())
	assert.Equal(t, string(msg), strings.TrimSpace(out.String()))
}

// permHarness is an embedded server with the three roles, a daemon
// connection answering control requests, and a counter of refusals.
type permHarness struct {
	emb     *Embedded
	arming  *Arming
	ctl     *Control
	now     time.Time
	mu      sync.Mutex
	refused map[string]int
}

func newPermHarness(t *testing.T) *permHarness {
	t.Helper()
	h := &permHarness{now: time.Date(2026, 12, 2, 12, 0, 0, 0, time.UTC), refused: map[string]int{}}
	emb, err := StartEmbedded(EmbeddedConfig{Listen: "127.0.0.1:-1", StoreDir: t.TempDir(), Prefix: "sw", Users: []BusUser{
		{"daemon", "d-pass", RoleDaemon}, {"resp", "r-pass", RoleResponder}, {"oper", "o-pass", RoleOperator}}})
	require.NoError(t, err)
	t.Cleanup(emb.Shutdown)
	h.emb = emb
	h.arming, err = NewArming(ArmingConfig{Cameras: []string{"north"}}, h.now)
	require.NoError(t, err)
	h.ctl, err = NewControl(ControlConfig{Prefix: "sw", Arming: h.arming, Secret: "s3cret", Now: func() time.Time { return h.now },
		OnRefused: func(via string) { h.mu.Lock(); h.refused[via]++; h.mu.Unlock() }})
	require.NoError(t, err)
	dn := connect(t, emb.URL(), nats.UserInfo("daemon", "d-pass"))
	p, err := NewPublisher(context.Background(), dn, "sw", StreamConfig{})
	require.NoError(t, err, "the daemon role can create the stream")
	t.Cleanup(func() { p.Close() })
	ctx, cancel := context.WithCancel(context.Background())
	t.Cleanup(cancel)
	go h.ctl.Serve(ctx, dn)
	require.NoError(t, dn.Flush())
	return h
}

func (h *permHarness) armed(t *testing.T) bool {
	a, _ := h.arming.Armed("north", h.now)
	return a
}

func (h *permHarness) refusals(via string) int {
	h.mu.Lock()
	defer h.mu.Unlock()
	return h.refused[via]
}

func request(nc *nats.Conn, action, body string) (ControlReply, error) {
	m, err := nc.Request("sw.control."+action, []byte(body), 2*time.Second)
	if err != nil {
		return ControlReply{}, err
	}
	var r ControlReply
	return r, json.Unmarshal(m.Data, &r)
}

func TestResponderCannotDisarm(t *testing.T) {
	h := newPermHarness(t)
	var asyncErr error
	var mu sync.Mutex
	rc := connect(t, h.emb.URL(), nats.UserInfo("resp", "r-pass"), nats.ErrorHandler(func(_ *nats.Conn, _ *nats.Subscription, err error) {
		mu.Lock()
		asyncErr = err
		mu.Unlock()
	}))
	for _, action := range []string{ActionDisarm, ActionArm, ActionClear} {
		_, err := request(rc, action, `{"for":"1h","token":"s3cret"}`)
		assert.Error(t, err, "%s: server permissions must refuse a responder", action)
	}
	assert.True(t, h.armed(t), "state unchanged")
	mu.Lock()
	assert.ErrorContains(t, asyncErr, "Permissions Violation")
	mu.Unlock()

	rep, err := request(rc, ActionStatus, ``)
	require.NoError(t, err, "a responder may ask for status, without the token")
	require.True(t, rep.OK, rep.Error)
	require.Len(t, rep.Status.Cameras, 1)
	assert.True(t, rep.Status.Cameras[0].Armed)
}

func TestOperatorNeedsToken(t *testing.T) {
	h := newPermHarness(t)
	oc := connect(t, h.emb.URL(), nats.UserInfo("oper", "o-pass"))
	rc := connect(t, h.emb.URL(), nats.UserInfo("resp", "r-pass"))
	// The responder watches everything it may; control requests, which
	// carry the token, must not reach it.
	seen := make(chan string, 16)
	_, err := rc.Subscribe("sw.>", func(m *nats.Msg) { seen <- m.Subject })
	require.NoError(t, err)
	require.NoError(t, rc.Flush())

	rep, err := request(oc, ActionDisarm, `{"for":"1h","token":"wrong"}`)
	require.NoError(t, err)
	assert.False(t, rep.OK)
	assert.Contains(t, rep.Error, "refused")
	assert.Equal(t, 1, h.refusals("nats"))
	assert.True(t, h.armed(t), "a refused request changes nothing")

	rep, err = request(oc, ActionDisarm, `{"for":"1h","token":"s3cret","by":"alice"}`)
	require.NoError(t, err)
	require.True(t, rep.OK, rep.Error)
	assert.False(t, h.armed(t), "the operator with the token disarmed")
	// The author is who the token stands for, not the body's by.
	assert.Equal(t, "nats:"+DefaultTokenName, rep.Status.Cameras[0].Override.By)

	hdr := nats.NewMsg("sw.control.arm")
	hdr.Header.Set("Authorization", "Bearer s3cret")
	m, err := oc.RequestMsg(hdr, 2*time.Second)
	require.NoError(t, err)
	require.NoError(t, json.Unmarshal(m.Data, &rep))
	require.True(t, rep.OK, rep.Error)
	assert.True(t, h.armed(t), "token in the header works too")

	// The subscription works: a daemon message arrives, and it is the
	// only thing that does.
	dn := connect(t, h.emb.URL(), nats.UserInfo("daemon", "d-pass"))
	require.NoError(t, dn.Publish("sw.north.heartbeat", []byte(`{}`)))
	require.NoError(t, dn.Flush())
	select {
	case s := <-seen:
		assert.Equal(t, "sw.north.heartbeat", s)
	case <-time.After(2 * time.Second):
		t.Fatal("responder saw nothing on sw.>")
	}
	select {
	case s := <-seen:
		t.Fatalf("responder also received %s", s)
	case <-time.After(200 * time.Millisecond):
	}
}

func TestUnauthenticatedClientRefused(t *testing.T) {
	h := newPermHarness(t)
	_, err := nats.Connect(h.emb.URL())
	require.Error(t, err)
	_, err = nats.Connect(h.emb.URL(), nats.UserInfo("oper", "nope"))
	require.Error(t, err)
}

func TestHTTPControlRefusals(t *testing.T) {
	h := newPermHarness(t)
	srv := httptest.NewServer(h.ctl.Handler())
	defer srv.Close()
	do := func(method, path, auth, body string) (int, ControlReply) {
		req, err := http.NewRequest(method, srv.URL+path, strings.NewReader(body))
		require.NoError(t, err)
		if auth != "" {
			req.Header.Set("Authorization", auth)
		}
		res, err := http.DefaultClient.Do(req)
		require.NoError(t, err)
		defer res.Body.Close()
		var r ControlReply
		require.NoError(t, json.NewDecoder(res.Body).Decode(&r))
		return res.StatusCode, r
	}
	cases := []struct {
		name, method, path, auth, body string
		code                           int
		refused                        int // cumulative http refusals after the case
		armed                          bool
	}{
		{"no token", "POST", "/control/disarm", "", `{"for":"1h"}`, 401, 1, true},
		{"wrong token", "POST", "/control/disarm", "Bearer nope", `{"for":"1h"}`, 401, 2, true},
		{"token in body is not enough over http", "POST", "/control/disarm", "", `{"for":"1h","token":"s3cret"}`, 401, 3, true},
		{"unauthorised malformed", "POST", "/control/disarm", "", `{"for":`, 401, 4, true},
		{"malformed", "POST", "/control/disarm", "Bearer s3cret", `{"for":"forever"}`, 400, 4, true},
		{"unknown field", "POST", "/control/disarm", "Bearer s3cret", `{"for":"1h","camera":"north","why":"x"}`, 400, 4, true},
		{"unknown camera", "POST", "/control/disarm", "Bearer s3cret", `{"for":"1h","camera":"south"}`, 400, 4, true},
		{"too long", "POST", "/control/disarm", "Bearer s3cret", `{"for":"48h"}`, 400, 4, true},
		{"wrong method", "GET", "/control/disarm", "Bearer s3cret", ``, 405, 4, true},
		{"status without token", "GET", "/control/status", "", ``, 200, 4, true},
		{"clear without token", "POST", "/control/clear", "", ``, 401, 5, true},
		{"disarm", "POST", "/control/disarm", "Bearer s3cret", `{"camera":"north","until":"2026-12-02T13:30:00+01:00"}`, 200, 5, false},
		{"status", "GET", "/control/status", "", ``, 200, 5, false},
		{"arm", "POST", "/control/arm", "Bearer s3cret", `{"for":"2h"}`, 200, 5, true},
	}
	for _, c := range cases {
		code, rep := do(c.method, c.path, c.auth, c.body)
		assert.Equal(t, c.code, code, "%s: %+v", c.name, rep)
		assert.Equal(t, c.code == 200, rep.OK, c.name)
		if c.code != 200 {
			assert.NotEmpty(t, rep.Error, c.name)
		}
		assert.Equal(t, c.refused, h.refusals("http"), c.name)
		assert.Equal(t, c.armed, h.armed(t), c.name)
	}
}

func TestLeafNodeForwardsToHub(t *testing.T) {
	lport := freePort(t)
	hub := mustStart(t, &server.Options{ServerName: "hub", Host: "127.0.0.1", Port: -1, NoSigs: true, NoLog: true,
		LeafNode: server.LeafNodeOpts{Host: "127.0.0.1", Port: lport}})
	defer stop(hub)
	home, err := StartEmbedded(EmbeddedConfig{Listen: "127.0.0.1:-1", StoreDir: t.TempDir(), Name: "home",
		Leaf: []LeafRemote{{URLs: []string{"nats-leaf://127.0.0.1:" + strconv.Itoa(lport)}}}})
	require.NoError(t, err)
	defer home.Shutdown()
	require.Eventually(t, func() bool { return hub.NumLeafNodes() == 1 }, 10*time.Second, 20*time.Millisecond)

	central := connect(t, hub.ClientURL())
	sub, err := central.SubscribeSync("sw.*.target")
	require.NoError(t, err)
	require.NoError(t, central.Flush())
	nc := connect(t, home.URL())
	p, err := NewPublisher(context.Background(), nc, "sw", StreamConfig{})
	require.NoError(t, err, "the home stream lives in its own JetStream domain")
	defer p.Close()
	msg := targetJSON(t, "north", 1, "start")
	// Interest crosses the leaf connection asynchronously; resend (same
	// id, so the stream keeps one) until the hub's subscriber sees it.
	var got *nats.Msg
	require.Eventually(t, func() bool {
		require.NoError(t, p.Publish(context.Background(), "north", KindTarget, "leaf-1", msg))
		got, err = sub.NextMsg(100 * time.Millisecond)
		return err == nil
	}, 10*time.Second, 10*time.Millisecond)
	assert.Equal(t, string(msg), string(got.Data))
}

func TestConnectOptionsErrors(t *testing.T) {
	dir := t.TempDir()
	garbage := filepath.Join(dir, "garbage.pem")
	require.NoError(t, os.WriteFile(garbage, []byte("not a certificate"), 0o600))
	cases := []struct {
		name string
		a    BusAuth
		want string
	}{
		{"user without password", BusAuth{User: "u"}, "user and password go together"},
		{"two kinds", BusAuth{User: "u", Password: "p", Token: "t"}, "not several"},
		{"missing seed", BusAuth{NKeySeedFile: filepath.Join(dir, "none.nk")}, "nkey seed file: open"},
		{"missing creds", BusAuth{CredsFile: filepath.Join(dir, "none.creds")}, "creds file: open"},
		{"missing ca", BusAuth{CAFile: filepath.Join(dir, "ca.pem")}, "ca file: open"},
		{"bad ca", BusAuth{CAFile: garbage}, "no PEM certificate"},
		{"cert without key", BusAuth{CertFile: garbage}, "go together"},
		{"bad pair", BusAuth{CertFile: garbage, KeyFile: garbage}, "client cert"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			_, err := ConnectOptions(c.a)
			require.Error(t, err)
			assert.Contains(t, err.Error(), c.want)
		})
	}
	opts, err := ConnectOptions(BusAuth{Token: "t"})
	require.NoError(t, err)
	assert.Len(t, opts, 1)
}

func TestConnectOptionsAuthenticate(t *testing.T) {
	srv := mustStart(t, &server.Options{Host: "127.0.0.1", Port: -1, NoSigs: true, NoLog: true, Authorization: "tok-123"})
	defer stop(srv)
	for _, c := range []struct {
		tok string
		ok  bool
	}{{"tok-123", true}, {"tok-999", false}} {
		opts, err := ConnectOptions(BusAuth{Token: c.tok})
		require.NoError(t, err)
		nc, err := nats.Connect(srv.ClientURL(), opts...)
		if c.ok {
			require.NoError(t, err)
			nc.Close()
		} else {
			require.Error(t, err)
		}
	}
}

func TestSecretResolve(t *testing.T) {
	dir := t.TempDir()
	f := filepath.Join(dir, "s")
	require.NoError(t, os.WriteFile(f, []byte("  from-file\n"), 0o600))
	empty := filepath.Join(dir, "e")
	require.NoError(t, os.WriteFile(empty, []byte("\n"), 0o600))
	env := map[string]string{"SW_SECRET": "from-env"}
	getenv := func(k string) string { return env[k] }
	cases := []struct {
		name   string
		s      Secret
		want   string
		inline bool
		err    string
	}{
		{"none", Secret{}, "", false, ""},
		{"inline", Secret{Value: "x"}, "x", true, ""},
		{"env", Secret{Env: "SW_SECRET"}, "from-env", false, ""},
		{"file", Secret{File: f}, "from-file", false, ""},
		{"unset env", Secret{Env: "SW_NOPE"}, "", false, "SW_NOPE is empty or unset"},
		{"missing file", Secret{File: filepath.Join(dir, "nope")}, "", false, "read secret file"},
		{"empty file", Secret{File: empty}, "", false, "is empty"},
		{"two ways", Secret{Value: "x", Env: "SW_SECRET"}, "", false, "one way only"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			got, inline, err := c.s.Resolve(getenv)
			if c.err != "" {
				require.Error(t, err)
				assert.Contains(t, err.Error(), c.err)
				assert.NotContains(t, err.Error(), "from-")
				return
			}
			require.NoError(t, err)
			assert.Equal(t, c.want, got)
			assert.Equal(t, c.inline, inline)
		})
	}
}

// TestDeployNATSConfigs parses the example server configs in deploy/nats
// with nats-server's own parser and checks that the cluster's user roles
// are the ones the embedded server gives.
func TestDeployNATSConfigs(t *testing.T) {
	dir := filepath.Join("..", "deploy", "nats")
	for _, v := range []string{"CLUSTER_ROUTE_PASSWORD", "HOME_LEAF_PASSWORD", "DAEMON_PASSWORD", "RESPONDER_PASSWORD", "OPERATOR_PASSWORD"} {
		t.Setenv(v, "example-"+strings.ToLower(v))
	}
	for _, node := range []string{"a", "b", "c"} {
		opts, err := server.ProcessConfigFile(filepath.Join(dir, "node-"+node+".conf"))
		require.NoError(t, err, node)
		assert.Equal(t, "nats-"+node, opts.ServerName)
		assert.Equal(t, "stillwater-central", opts.Cluster.Name)
		assert.Len(t, opts.Routes, 3)
		assert.True(t, opts.JetStream)
		assert.Equal(t, "central", opts.JetStreamDomain)
		assert.Equal(t, 7422, opts.LeafNode.Port)
		assert.Equal(t, "example-home_leaf_password", opts.LeafNode.Password, "secrets come from the environment")
		roles := map[string]string{"daemon": RoleDaemon, "responder": RoleResponder, "operator": RoleOperator}
		require.Len(t, opts.Users, 3)
		for _, u := range opts.Users {
			want, err := rolePermissions("stillwater", roles[u.Username])
			require.NoError(t, err, u.Username)
			assert.Equal(t, want.Publish, u.Permissions.Publish, u.Username)
			assert.Equal(t, want.Subscribe, u.Permissions.Subscribe, u.Username)
		}
	}
	opts, err := server.ProcessConfigFile(filepath.Join(dir, "leaf-home.conf"))
	require.NoError(t, err)
	require.Len(t, opts.LeafNode.Remotes, 1)
	assert.Len(t, opts.LeafNode.Remotes[0].URLs, 3)
	assert.Equal(t, "home", opts.JetStreamDomain)
	assert.Equal(t, "127.0.0.1", opts.Host)
}

// TestBusPortInUse starts the embedded server on ports that another
// listener holds: the error must name the port and say it is in use,
// rather than report a server that did not become ready.
func TestBusPortInUse(t *testing.T) {
	held, err := net.Listen("tcp", "127.0.0.1:0")
	require.NoError(t, err)
	defer held.Close()
	port := strconv.Itoa(held.Addr().(*net.TCPAddr).Port)
	cases := []struct {
		name string
		cfg  EmbeddedConfig
		want string
	}{
		{"client port", EmbeddedConfig{Listen: "127.0.0.1:" + port}, "bus.listen"},
		{"mqtt port", EmbeddedConfig{Listen: "127.0.0.1:-1", MQTT: "127.0.0.1:" + port}, "bus.mqtt"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			c.cfg.StoreDir = t.TempDir()
			start := time.Now()
			emb, err := StartEmbedded(c.cfg)
			if err == nil {
				emb.Shutdown()
			}
			require.Error(t, err)
			t.Logf("refused after %v: %v", time.Since(start), err)
			assert.Contains(t, err.Error(), "127.0.0.1:"+port)
			assert.Contains(t, err.Error(), "in use")
			assert.Contains(t, err.Error(), c.want)
		})
	}
}
