package bus

import (
	"bytes"
	"context"
	"os/exec"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"stillwater/alert"
)

// subResult is what mosquitto_sub printed and how it ended.
type subResult struct {
	out, stderr string
	err         error
}

// mosquittoSub runs Debian's mosquitto_sub (mosquitto-clients) against
// the MQTT listener on port as user (no login when user is empty) at
// MQTT quality of service qos, for
// one message or until wait, and returns a channel that yields its
// result once it exits.
func mosquittoSub(t *testing.T, ctx context.Context, port, qos int, user, pass, topic string, wait time.Duration) <-chan subResult {
	t.Helper()
	bin, err := exec.LookPath("mosquitto_sub")
	if err != nil {
		t.Skip("mosquitto_sub not installed (Debian package mosquitto-clients; deploy/setup installs it)")
	}
	args := []string{"-h", "127.0.0.1", "-p", strconv.Itoa(port), "-t", topic, "-C", "1", "-W", strconv.Itoa(int(wait.Seconds())),
		"-i", "stillwater-test-" + user, "-V", "mqttv311", "-q", strconv.Itoa(qos)}
	if user != "" {
		args = append(args, "-u", user, "-P", pass)
	}
	cmd := exec.CommandContext(ctx, bin, args...)
	var out, errb bytes.Buffer
	cmd.Stdout, cmd.Stderr = &out, &errb
	require.NoError(t, cmd.Start())
	done := make(chan subResult, 1)
	go func() {
		err := cmd.Wait()
		done <- subResult{out: strings.TrimSpace(out.String()), stderr: strings.TrimSpace(errb.String()), err: err}
	}()
	return done
}

// TestMQTTUsesBusUsersAndRoles logs MQTT clients in with the embedded
// server's users: a responder subscribes to every camera's targets
// (subject sw.*.target is topic sw/+/target, as nats-server's MQTT
// documentation maps them) and receives one; a wrong password, no login,
// and a user whose role may not read targets are refused.
func TestMQTTUsesBusUsersAndRoles(t *testing.T) {
	mport := freePort(t)
	emb, err := StartEmbedded(EmbeddedConfig{Listen: "127.0.0.1:-1", MQTT: "127.0.0.1:" + strconv.Itoa(mport), StoreDir: t.TempDir(),
		Name: "mqtt-users", Prefix: "sw", Users: []User{{"daemon", "d-pass", RoleDaemon}, {"pager", "p-pass", RoleResponder}}})
	require.NoError(t, err)
	defer emb.Shutdown()
	p, err := NewPublisher(context.Background(), connect(t, emb.URL(), nats.UserInfo("daemon", "d-pass")), "sw", StreamConfig{})
	require.NoError(t, err)
	defer p.Close()
	ctx, cancel := context.WithTimeout(context.Background(), 60*time.Second)
	defer cancel()

	// mosquitto_sub reports a refused login (CONNACK "not authorised",
	// exit status 5) and a refused subscription (SUBACK failure code
	// 0x80) in its own words.
	const loginRefused, subRefused = "Connection Refused: not authorised", "All subscription requests were denied"
	refused := []struct {
		name, user, pass, topic, want string
	}{
		{"wrong password", "pager", "nope", "sw/+/target", loginRefused},
		{"no login", "", "", "sw/+/target", loginRefused},
		{"daemon role may not read targets", "daemon", "d-pass", "sw/+/target", subRefused},
		{"responder may not read control requests", "pager", "p-pass", "sw/control/#", subRefused},
	}
	for _, c := range refused {
		t.Run(c.name, func(t *testing.T) {
			r := <-mosquittoSub(t, ctx, mport, 0, c.user, c.pass, c.topic, 10*time.Second)
			assert.Contains(t, r.stderr, c.want)
			assert.Empty(t, r.out)
		})
	}

	for qos := 0; qos <= 1; qos++ {
		t.Run("responder reads targets at QoS "+strconv.Itoa(qos), func(t *testing.T) {
			r := publishUntilReceived(t, ctx, p, mosquittoSub(t, ctx, mport, qos, "pager", "p-pass", "sw/+/target", 20*time.Second), "mqtt-user-"+strconv.Itoa(qos))
			require.NoError(t, r.err, "mosquitto_sub: %s", r.stderr)
		})
	}
}

// TestMQTTSubscriberGetsTarget checks the MQTT bridge of a server
// without users, as on loopback: NATS subject a.b.c is MQTT topic a/b/c.
func TestMQTTSubscriberGetsTarget(t *testing.T) {
	mport := freePort(t)
	emb, err := StartEmbedded(EmbeddedConfig{Listen: "127.0.0.1:-1", MQTT: "127.0.0.1:" + strconv.Itoa(mport), StoreDir: t.TempDir(), Name: "mqtt"})
	require.NoError(t, err)
	defer emb.Shutdown()
	p, err := NewPublisher(context.Background(), connect(t, emb.URL()), "stillwater", StreamConfig{})
	require.NoError(t, err)
	defer p.Close()
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	r := publishUntilReceived(t, ctx, p, mosquittoSub(t, ctx, mport, 0, "", "", "stillwater/north/target", 20*time.Second), "mqtt-1")
	require.NoError(t, r.err, "mosquitto_sub: %s", r.stderr)
}

// publishUntilReceived publishes one target for camera north under id
// until mosquitto_sub exits, and checks that it printed that target. The
// MQTT subscription is made some time after the process starts and
// cannot be observed from here; the message keeps one id, so the stream
// keeps one copy.
func publishUntilReceived(t *testing.T, ctx context.Context, p *Publisher, done <-chan subResult, id string) subResult {
	t.Helper()
	msg := targetJSON(t, "north", 1, "start")
	tick := time.NewTicker(200 * time.Millisecond)
	defer tick.Stop()
	for {
		require.NoError(t, p.Publish(ctx, "north", alert.KindTarget, id, msg))
		select {
		case r := <-done:
			assert.Equal(t, string(msg), r.out)
			return r
		case <-tick.C:
		}
	}
}
