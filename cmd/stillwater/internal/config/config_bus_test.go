package config

import (
	"context"
	"encoding/json"
	"io"
	"log/slog"
	"net/http"
	"net/http/httptest"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"stillwater/alert/arming"
	"stillwater/alert/bus"
)

const busYAML = goodConfig + `
bus:
  listen: 127.0.0.1:4222
  mqtt: 127.0.0.1:1883
  subject_prefix: sw
  users:
    - {name: stillwater, role: daemon, password_env: SW_TEST_DAEMON_PW}
    - {name: pager, role: responder, password_file: PWFILE}
    - {name: alice, role: operator, password: "$2a$11$abcdefghijklmnopqrstuv"}
  leaf:
    - urls: [nats-leaf://hub.example:7422]
  stream: {max_age: 720h, max_bytes: 1000000, duplicates: 30m, replicas: 1, consumers: [dashboard, pager]}
  outbox: {max_messages: 500, max_bytes: 1000000, ack_timeout: 1500ms, dead_letter_max_bytes: 2000000}
control:
  secret_env: SW_TEST_CONTROL
  max_disarm: 12h
`

func TestBusConfigFromYAML(t *testing.T) {
	dir := t.TempDir()
	pwfile := filepath.Join(dir, "pager.pw")
	require.NoError(t, os.WriteFile(pwfile, []byte("pager-pw\n"), 0o600))
	cfg, err := ParseConfig([]byte(strings.Replace(busYAML, "PWFILE", pwfile, 1)))
	require.NoError(t, err)
	require.NoError(t, validateControl(cfg.Control, cfg.Bus))
	env := map[string]string{"SW_TEST_DAEMON_PW": "daemon-pw", "SW_TEST_CONTROL": "ctl"}
	getenv := func(k string) string { return env[k] }

	ec, warn, err := cfg.Bus.embeddedConfig("/data", getenv)
	require.NoError(t, err)
	assert.Empty(t, warn)
	assert.Equal(t, []bus.User{{Name: "stillwater", Password: "daemon-pw", Role: "daemon"}, {Name: "pager", Password: "pager-pw", Role: "responder"},
		{Name: "alice", Password: "$2a$11$abcdefghijklmnopqrstuv", Role: "operator"}}, ec.Users)
	assert.Equal(t, "/data/jetstream", ec.StoreDir)
	assert.Equal(t, "sw", ec.Prefix)
	require.Len(t, ec.Leaf, 1)

	opts, warn, err := cfg.Bus.connectOptions(getenv)
	require.NoError(t, err)
	assert.Empty(t, warn)
	assert.Len(t, opts, 1, "the daemon logs in as its daemon-role user")

	pc := cfg.Bus.publisherConfig("/data")
	assert.Equal(t, "/data/outbox", pc.Outbox.Dir)
	assert.Equal(t, 500, pc.Outbox.MaxMessages)
	assert.Equal(t, int64(2000000), pc.Outbox.DeadLetterMaxBytes)
	assert.Equal(t, 1500*time.Millisecond, pc.AckTimeout)
	assert.Equal(t, 30*time.Minute, pc.Stream.Duplicates)
	assert.Equal(t, []string{"pager", "alice", "dashboard"}, pc.Consumers, "every responder and operator, then those listed, once each")
	assert.Equal(t, "", ec.Stream, "the default stream name")

	sec, warn, err := cfg.Control.controlSecret(getenv)
	require.NoError(t, err)
	assert.Equal(t, "ctl", sec)
	assert.Empty(t, warn)

	_, _, err = cfg.Bus.embeddedConfig("/data", func(string) string { return "" })
	require.Error(t, err)
	assert.Contains(t, err.Error(), "bus.users[0].password: environment variable SW_TEST_DAEMON_PW is empty or unset")
}

func TestInlineSecretsWarn(t *testing.T) {
	b := BusConfig{URL: "nats://bus.example:4222", Prefix: "sw", Auth: BusAuthConfig{User: "u", Password: "inline-pw"}}
	require.NoError(t, validateBus(b))
	_, warn, err := b.connectOptions(func(string) string { return "" })
	require.NoError(t, err)
	require.Len(t, warn, 1)
	assert.Contains(t, warn[0], "bus.auth.password is written in the config file")
	assert.NotContains(t, warn[0], "inline-pw")

	_, warn, err = ControlConfig{Secret: "s"}.controlSecret(func(string) string { return "" })
	require.NoError(t, err)
	assert.Len(t, warn, 1)
}

func TestValidateBusErrors(t *testing.T) {
	ok := BusConfig{Listen: "127.0.0.1:4222", Prefix: "sw"}
	cases := []struct {
		name string
		edit func(*BusConfig)
		want string
	}{
		{"nothing", func(b *BusConfig) { b.Listen = "" }, "neither url nor listen"},
		{"prefix", func(b *BusConfig) { b.Prefix = "a.b" }, "bus.subject_prefix"},
		{"url scheme", func(b *BusConfig) { b.URL = "http://x:4222" }, `bus.url: scheme "http"`},
		{"urls entry", func(b *BusConfig) { b.URL = "nats://a:4222"; b.URLs = []string{"nats://b:4222", "nonsense"} }, "bus.urls[1]"},
		{"mqtt with external", func(b *BusConfig) { b.URL = "nats://a:4222"; b.MQTT = ":1883" }, "bus.mqtt"},
		{"users with external", func(b *BusConfig) {
			b.URL = "nats://a:4222"
			b.Users = []BusUserConfig{{Name: "d", Role: "daemon", PasswordEnv: "X"}}
		}, "bus.users: only the embedded"},
		{"role", func(b *BusConfig) { b.Users = []BusUserConfig{{Name: "d", Role: "root", PasswordEnv: "X"}} }, `bus.users[0] (d).role: "root"`},
		{"user password missing", func(b *BusConfig) { b.Users = []BusUserConfig{{Name: "d", Role: "daemon"}} }, "bus.users[0] (d): password: missing"},
		{"two password sources", func(b *BusConfig) {
			b.Users = []BusUserConfig{{Name: "d", Role: "daemon", PasswordEnv: "X", PasswordFile: "/f"}}
		}, "one way only"},
		{"no daemon user", func(b *BusConfig) { b.Users = []BusUserConfig{{Name: "p", Role: "responder", PasswordEnv: "X"}} }, "no user has role daemon"},
		{"auth user alone", func(b *BusConfig) { b.Auth.User = "u" }, "bus.auth: user and a password"},
		{"auth two kinds", func(b *BusConfig) { b.Auth.TokenEnv = "T"; b.Auth.CredsFile = "/c" }, "use one of"},
		{"tls half", func(b *BusConfig) { b.TLS.CertFile = "/c" }, "bus.tls"},
		{"leaf no urls", func(b *BusConfig) { b.Leaf = []LeafConfig{{}} }, "bus.leaf[0].urls: empty"},
		{"leaf scheme", func(b *BusConfig) { b.Leaf = []LeafConfig{{URLs: []string{"ftp://h:1"}}} }, "bus.leaf[0].urls[0]"},
		{"replicas", func(b *BusConfig) { b.Stream.Replicas = 7 }, "bus.stream.replicas"},
		{"duplicates", func(b *BusConfig) {
			b.Stream.MaxAge = Duration(time.Hour)
			b.Stream.Duplicates = Duration(2 * time.Hour)
		}, "bus.stream.duplicates"},
		{"ack timeout", func(b *BusConfig) { b.Outbox.AckTimeout = Duration(time.Minute) }, "bus.outbox.ack_timeout"},
		{"dead-letter bound", func(b *BusConfig) { b.Outbox.DeadLetterMaxBytes = -1 }, "bus.outbox.dead_letter_max_bytes: -1"},
		{"consumer name", func(b *BusConfig) { b.Stream.Consumers = []string{"ok", "a/b"} }, "bus.stream.consumers[1]"},
		{"consumer twice", func(b *BusConfig) { b.Stream.Consumers = []string{"x", "x"} }, "listed twice"},
		{"operator name", func(b *BusConfig) {
			b.Users = []BusUserConfig{{Name: "d", Role: "daemon", PasswordEnv: "X"}, {Name: "al/ice", Role: "operator", PasswordEnv: "Y"}}
		}, "bus.users[1].name"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			b := ok
			c.edit(&b)
			err := validateBus(b)
			require.Error(t, err)
			assert.Contains(t, err.Error(), c.want)
		})
	}
	require.NoError(t, validateBus(ok))
}

func TestValidateControl(t *testing.T) {
	emb := BusConfig{Listen: "127.0.0.1:4222", Prefix: "sw"}
	assert.NoError(t, validateControl(ControlConfig{}, emb), "no secret: HTTP and NATS control refuse changes, status works")
	assert.ErrorContains(t, validateControl(ControlConfig{SecretEnv: "A", SecretFile: "/b"}, emb), "control.secret")
	assert.ErrorContains(t, validateControl(ControlConfig{TrustNATS: true}, emb), "control.trust_nats")
	emb.Users = []BusUserConfig{{Name: "d", Role: "daemon", PasswordEnv: "X"}}
	assert.NoError(t, validateControl(ControlConfig{TrustNATS: true}, emb))
	assert.ErrorContains(t, validateControl(ControlConfig{MaxDisarm: Duration(200 * time.Hour)}, emb), "control.max_disarm")
}

// TestOpenBusEndToEnd opens the whole bus side from a config, as serve
// does: embedded server with users, outbox, arming and control; a
// responder sees the start-up armed message and an operator's disarm.
func TestOpenBusEndToEnd(t *testing.T) {
	t.Setenv("SW_TEST_DAEMON_PW", "daemon-pw")
	t.Setenv("SW_TEST_CONTROL", "ctl-token")
	cfg := Defaults()
	cfg.DataDir = t.TempDir()
	cfg.Bus = BusConfig{Listen: "127.0.0.1:-1", Prefix: "sw", Users: []BusUserConfig{
		{Name: "stillwater", Role: bus.RoleDaemon, PasswordEnv: "SW_TEST_DAEMON_PW"},
		{Name: "pager", Role: bus.RoleResponder, Password: "pager-pw"}}}
	// The override's author is the name bound to the token, not the body's by.
	cfg.Control = ControlConfig{SecretEnv: "SW_TEST_CONTROL", TokenName: "test"}
	require.NoError(t, validateBus(cfg.Bus))
	require.NoError(t, validateControl(cfg.Control, cfg.Bus))
	refused := make(chan string, 4)
	b, err := OpenBus(context.Background(), cfg, arming.Config{Cameras: []string{"pool"}}, time.Now,
		slog.New(slog.NewTextHandler(io.Discard, nil)), BusHooks{OnRefused: func(via string) { refused <- via }})
	require.NoError(t, err)
	defer b.Close()

	rc, err := nats.Connect(b.Embedded.URL(), nats.UserInfo("pager", "pager-pw"))
	require.NoError(t, err)
	defer rc.Close()
	sub, err := rc.SubscribeSync("sw.pool.armed")
	require.NoError(t, err)
	require.NoError(t, rc.Flush())

	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- b.Run(ctx) }()
	m, err := sub.NextMsg(5 * time.Second)
	require.NoError(t, err)
	assert.Contains(t, string(m.Data), `"armed":true`)

	srv := httptest.NewServer(b.Control.Handler())
	defer srv.Close()
	req, err := http.NewRequest("POST", srv.URL+"/control/disarm", strings.NewReader(`{"for":"1h","by":"test"}`))
	require.NoError(t, err)
	res, err := http.DefaultClient.Do(req) // no token
	require.NoError(t, err)
	res.Body.Close()
	assert.Equal(t, http.StatusUnauthorized, res.StatusCode)
	assert.Equal(t, "http", <-refused)
	req, err = http.NewRequest("POST", srv.URL+"/control/disarm", strings.NewReader(`{"for":"1h","by":"someone-else"}`))
	require.NoError(t, err)
	req.Header.Set("Authorization", "Bearer ctl-token")
	res, err = http.DefaultClient.Do(req)
	require.NoError(t, err)
	res.Body.Close()
	assert.Equal(t, http.StatusOK, res.StatusCode)
	m, err = sub.NextMsg(5 * time.Second)
	require.NoError(t, err)
	assert.Contains(t, string(m.Data), `"armed":false`)
	assert.Contains(t, string(m.Data), `"by":"http:test"`)

	require.NoError(t, b.Pub.Flush(context.Background()))
	cancel()
	require.NoError(t, <-done)
	_, err = os.Stat(filepath.Join(cfg.DataDir, "arming.json"))
	assert.NoError(t, err, "the disarm was saved")
	_, err = os.Stat(filepath.Join(cfg.DataDir, "outbox", "outbox.log"))
	assert.NoError(t, err, "the outbox lives in the data directory")
}

// TestNATSControlRecordsBusUser runs trust_nats through openBus, as serve
// does: a request on an operator's own control subject is recorded as
// made by that bus user, whatever its body says; the server refuses one
// operator's request on another's subject, so alice cannot act as bob;
// and the shared subject, which names no sender, is refused without the
// token.
func TestNATSControlRecordsBusUser(t *testing.T) {
	cfg := Defaults()
	cfg.DataDir = t.TempDir()
	cfg.Bus = BusConfig{Listen: "127.0.0.1:-1", Prefix: "sw", Users: []BusUserConfig{
		{Name: "stillwater", Role: bus.RoleDaemon, Password: "daemon-pw"},
		{Name: "alice", Role: bus.RoleOperator, Password: "alice-pw"},
		{Name: "bob", Role: bus.RoleOperator, Password: "bob-pw"}}}
	cfg.Control = ControlConfig{TrustNATS: true}
	require.NoError(t, validateBus(cfg.Bus))
	require.NoError(t, validateControl(cfg.Control, cfg.Bus))
	b, err := OpenBus(context.Background(), cfg, arming.Config{Cameras: []string{"pool"}}, time.Now,
		slog.New(slog.NewTextHandler(io.Discard, nil)), BusHooks{})
	require.NoError(t, err)
	defer b.Close()

	login := func(user, pw string) (*nats.Conn, chan error) {
		errs := make(chan error, 4)
		nc, err := nats.Connect(b.Embedded.URL(), nats.UserInfo(user, pw),
			nats.ErrorHandler(func(_ *nats.Conn, _ *nats.Subscription, err error) { errs <- err }))
		require.NoError(t, err)
		t.Cleanup(nc.Close)
		return nc, errs
	}
	request := func(nc *nats.Conn, subject, body string) arming.ControlReply {
		t.Helper()
		m, err := nc.Request(subject, []byte(body), 5*time.Second)
		require.NoError(t, err, subject)
		var rep arming.ControlReply
		require.NoError(t, json.Unmarshal(m.Data, &rep))
		return rep
	}
	override := func(rep arming.ControlReply) string {
		t.Helper()
		require.True(t, rep.OK, rep.Error)
		require.Len(t, rep.Status.Cameras, 1)
		if rep.Status.Cameras[0].Override == nil {
			return ""
		}
		return rep.Status.Cameras[0].Override.By
	}
	alice, aliceErrs := login("alice", "alice-pw")
	bob, _ := login("bob", "bob-pw")
	armed, err := alice.SubscribeSync("sw.pool.armed")
	require.NoError(t, err)
	require.NoError(t, alice.Flush())
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- b.Run(ctx) }()
	defer func() { cancel(); require.NoError(t, <-done) }()
	_, err = armed.NextMsg(5 * time.Second) // the start-up state
	require.NoError(t, err)
	// Run subscribes the control service beside the arming loop, so the
	// start-up state can arrive before anyone answers control requests.
	require.Eventually(t, func() bool {
		_, err := alice.Request("sw.control.alice.status", nil, time.Second)
		return err == nil
	}, 10*time.Second, 20*time.Millisecond, "control never answered")

	assert.Equal(t, "nats:alice", override(request(alice, "sw.control.alice.disarm", `{"for":"1h","by":"bob"}`)),
		"the author is the bus user the subject belongs to, not the body's by")
	m, err := armed.NextMsg(5 * time.Second)
	require.NoError(t, err)
	assert.Contains(t, string(m.Data), `"by":"nats:alice"`, "the armed message names her too")

	// Alice sends on Bob's subject: the server refuses it, nothing changes.
	require.NoError(t, alice.Publish("sw.control.bob.arm", []byte(`{"for":"1h"}`)))
	select {
	case err := <-aliceErrs:
		assert.ErrorContains(t, err, `Permissions Violation for Publish to "sw.control.bob.arm"`)
	case <-time.After(5 * time.Second):
		t.Fatal("the server let alice publish on bob's control subject")
	}
	st := request(alice, "sw.control.alice.status", ``)
	assert.Equal(t, "nats:alice", override(st), "still alice's disarm")
	assert.False(t, st.Status.Cameras[0].Armed)

	rep := request(alice, "sw.control.arm", `{"by":"alice"}`)
	assert.False(t, rep.OK, "the shared subject without the token names no one")
	assert.Contains(t, rep.Error, "sw.control.YOUR-USER.arm")

	assert.Equal(t, "nats:bob", override(request(bob, "sw.control.bob.arm", `{"for":"2h"}`)))
	m, err = armed.NextMsg(5 * time.Second)
	require.NoError(t, err)
	assert.Contains(t, string(m.Data), `"by":"nats:bob"`)
	require.NoError(t, b.Pub.Flush(context.Background()))
}
