package bus

import (
	"context"
	"net"
	"os"
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

	"stillwater/alert"
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
		{"bad role", EmbeddedConfig{Prefix: "sw", Users: []User{{Name: "a", Password: "p", Role: "admin"}}}, `role "admin"`},
		{"no password", EmbeddedConfig{Prefix: "sw", Users: []User{{Name: "a", Role: RoleDaemon}}}, "users[0]"},
		{"twice", EmbeddedConfig{Prefix: "sw", Users: []User{{"a", "p", RoleDaemon}, {"a", "q", RoleOperator}}}, "used twice"},
		{"no prefix", EmbeddedConfig{Users: []User{{"a", "p", RoleDaemon}}}, "prefix"},
		{"operator name with a slash", EmbeddedConfig{Prefix: "sw", Users: []User{{"a/b", "p", RoleOperator}}}, "users[0]: name"},
		{"responder name with a dot", EmbeddedConfig{Prefix: "sw", Users: []User{{"a.b", "p", RoleResponder}}}, "users[0]: name"},
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

// permServer is an embedded server with the three roles and a stand-in
// for the daemon's control service, logged in as the daemon: it records
// the subject of every control request that reaches it and answers ok.
type permServer struct {
	emb  *Embedded
	mu   sync.Mutex
	seen []string
}

func newPermServer(t *testing.T) *permServer {
	t.Helper()
	emb, err := StartEmbedded(EmbeddedConfig{Listen: "127.0.0.1:-1", StoreDir: t.TempDir(), Prefix: "sw", Users: []User{
		{"daemon", "d-pass", RoleDaemon}, {"resp", "r-pass", RoleResponder}, {"oper", "o-pass", RoleOperator}, {"bob", "b-pass", RoleOperator}}})
	require.NoError(t, err)
	t.Cleanup(emb.Shutdown)
	ps := &permServer{emb: emb}
	dn := connect(t, emb.URL(), nats.UserInfo("daemon", "d-pass"))
	_, err = dn.Subscribe("sw.control.>", func(m *nats.Msg) {
		ps.mu.Lock()
		ps.seen = append(ps.seen, m.Subject)
		ps.mu.Unlock()
		m.Respond([]byte(`{"ok":true}`))
	})
	require.NoError(t, err)
	require.NoError(t, dn.Flush())
	return ps
}

var permPasswords = map[string]string{"daemon": "d-pass", "resp": "r-pass", "oper": "o-pass", "bob": "b-pass"}

// reached returns the control subjects that reached the stand-in so far
// and forgets them.
func (ps *permServer) reached() []string {
	ps.mu.Lock()
	defer ps.mu.Unlock()
	out := ps.seen
	ps.seen = nil
	return out
}

// TestControlPublishPermissions sends control subjects as each role. An
// allowed request reaches the stand-in for the daemon. A refused one
// draws the server's permissions violation; the server then drops it,
// which a later status request on the same connection confirms: the
// server keeps one publisher's messages in order, so once the status
// reply is in, a refused request that had got through would have reached
// the stand-in before it.
func TestControlPublishPermissions(t *testing.T) {
	ps := newPermServer(t)
	cases := []struct {
		user, subject string
		allowed       bool
	}{
		{"resp", "sw.control.status", true},
		{"resp", "sw.control.resp.status", true},
		{"resp", "sw.control.arm", false},
		{"resp", "sw.control.resp.disarm", false},
		{"resp", "sw.control.oper.status", false},
		{"oper", "sw.control.status", true},
		{"oper", "sw.control.disarm", true}, // the shared subject: Control wants the token there
		{"oper", "sw.control.oper.arm", true},
		{"oper", "sw.control.oper.disarm", true},
		{"oper", "sw.control.oper.clear", true},
		{"oper", "sw.control.oper.status", true},
		{"oper", "sw.control.bob.disarm", false}, // one operator acting as another
		{"oper", "sw.control.bob.status", false},
		{"oper", "sw.control.oper.disarm.now", false},
		{"bob", "sw.control.bob.disarm", true},
		{"bob", "sw.control.oper.clear", false},
		{"daemon", "sw.control.oper.disarm", false}, // not even the daemon's user may speak for an operator
		{"daemon", "sw.control.disarm", false},
	}
	for _, c := range cases {
		t.Run(c.user+" "+c.subject, func(t *testing.T) {
			violations := make(chan error, 4)
			nc := connect(t, ps.emb.URL(), nats.UserInfo(c.user, permPasswords[c.user]),
				nats.ErrorHandler(func(_ *nats.Conn, _ *nats.Subscription, err error) { violations <- err }))
			ps.reached()
			if c.allowed {
				_, err := nc.Request(c.subject, []byte(`{"for":"1h"}`), 5*time.Second)
				require.NoError(t, err)
				assert.Equal(t, []string{c.subject}, ps.reached())
				return
			}
			require.NoError(t, nc.Publish(c.subject, []byte(`{"for":"1h"}`)))
			select {
			case err := <-violations:
				assert.ErrorContains(t, err, "Permissions Violation for Publish to \""+c.subject+"\"")
			case <-time.After(5 * time.Second):
				t.Fatal("the server did not report a permissions violation")
			}
			if c.user != "daemon" {
				_, err := nc.Request("sw.control.status", nil, 5*time.Second)
				require.NoError(t, err, "status is open to every reader")
				assert.Equal(t, []string{"sw.control.status"}, ps.reached(), "the refused request must not reach the daemon")
			} else {
				assert.Empty(t, ps.reached())
			}
		})
	}
}

// Control requests may carry the control token: no reader sees them,
// while the daemon's messages reach it.
func TestReadersDoNotSeeControlRequests(t *testing.T) {
	ps := newPermServer(t)
	oc := connect(t, ps.emb.URL(), nats.UserInfo("oper", "o-pass"))
	seen := make(chan string, 16)
	readers := []string{"resp", "oper", "bob"}
	for _, u := range readers {
		rc := connect(t, ps.emb.URL(), nats.UserInfo(u, permPasswords[u]))
		_, err := rc.Subscribe("sw.>", func(m *nats.Msg) { seen <- u + " " + m.Subject })
		require.NoError(t, err)
		require.NoError(t, rc.Flush())
	}
	for _, subj := range []string{"sw.control.disarm", "sw.control.oper.disarm"} {
		_, err := oc.Request(subj, []byte(`{"for":"1h","token":"s3cret"}`), 5*time.Second)
		require.NoError(t, err)
	}
	dn := connect(t, ps.emb.URL(), nats.UserInfo("daemon", "d-pass"))
	require.NoError(t, dn.Publish("sw.north.heartbeat", []byte(`{}`)))
	require.NoError(t, dn.Flush())
	var got []string
	for len(got) < len(readers) {
		select {
		case s := <-seen:
			got = append(got, s)
		case <-time.After(5 * time.Second):
			t.Fatalf("readers saw only %v", got)
		}
	}
	// The heartbeat was published after the disarm had been answered: had
	// the disarm reached a reader, it would have come first.
	assert.ElementsMatch(t, []string{"resp sw.north.heartbeat", "oper sw.north.heartbeat", "bob sw.north.heartbeat"}, got)
}

func TestUnauthenticatedClientRefused(t *testing.T) {
	ps := newPermServer(t)
	_, err := nats.Connect(ps.emb.URL())
	require.Error(t, err)
	_, err = nats.Connect(ps.emb.URL(), nats.UserInfo("oper", "nope"))
	require.Error(t, err)
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
		require.NoError(t, p.Publish(context.Background(), "north", alert.KindTarget, "leaf-1", msg))
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
		a    Auth
		want string
	}{
		{"user without password", Auth{User: "u"}, "user and password go together"},
		{"two kinds", Auth{User: "u", Password: "p", Token: "t"}, "not several"},
		{"missing seed", Auth{NKeySeedFile: filepath.Join(dir, "none.nk")}, "nkey seed file: open"},
		{"missing creds", Auth{CredsFile: filepath.Join(dir, "none.creds")}, "creds file: open"},
		{"missing ca", Auth{CAFile: filepath.Join(dir, "ca.pem")}, "ca file: open"},
		{"bad ca", Auth{CAFile: garbage}, "no PEM certificate"},
		{"cert without key", Auth{CertFile: garbage}, "go together"},
		{"bad pair", Auth{CertFile: garbage, KeyFile: garbage}, "client cert"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			_, err := ConnectOptions(c.a)
			require.Error(t, err)
			assert.Contains(t, err.Error(), c.want)
		})
	}
	opts, err := ConnectOptions(Auth{Token: "t"})
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
		opts, err := ConnectOptions(Auth{Token: c.tok})
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
	dir := filepath.Join("..", "..", "deploy", "nats")
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
			want, err := rolePermissions("stillwater", DefaultStreamName, u.Username, roles[u.Username])
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
