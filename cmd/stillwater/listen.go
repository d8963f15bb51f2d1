// Command stillwater listen prints live messages from the bus, one line
// each, or their raw JSON.
package main

import (
	"context"
	"encoding/json"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"strings"
	"sync"
	"time"

	"github.com/nats-io/nats.go"

	"stillwater/alert"
	"stillwater/alert/bus"
	"stillwater/cmd/stillwater/internal/config"
)

// listenFlags are the flags of "stillwater listen".
type listenFlags struct {
	url, prefix, camera, kind string
	json                      bool
	count                     int
	user, passwordEnv         string
	passwordFile              string
	tokenEnv, tokenFile       string
	nkey, creds               string
	tlsCA, tlsCert, tlsKey    string
}

// runListen is "stillwater listen": subscribe to PREFIX.CAMERA.KIND and
// print what arrives until ctx ends or -n messages were printed.
func runListen(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	var f listenFlags
	fs := flag.NewFlagSet("listen", flag.ContinueOnError)
	fs.SetOutput(stderr)
	fs.StringVar(&f.url, "url", "nats://127.0.0.1:4222", "bus `URLs`, comma-separated")
	fs.StringVar(&f.prefix, "prefix", "stillwater", "subject `prefix`")
	fs.StringVar(&f.camera, "camera", "*", "camera `id`, * for every camera")
	fs.StringVar(&f.kind, "kind", "", "message `kind`: target, cleared, fault, armed or heartbeat; empty for all")
	fs.BoolVar(&f.json, "json", false, "print each message's raw JSON instead of a line of text")
	fs.IntVar(&f.count, "n", 0, "exit after `count` messages; 0 runs until interrupted")
	fs.StringVar(&f.user, "user", "", "bus `user`")
	fs.StringVar(&f.passwordEnv, "password-env", "", "environment `variable` holding the password")
	fs.StringVar(&f.passwordFile, "password-file", "", "`file` holding the password")
	fs.StringVar(&f.tokenEnv, "token-env", "", "environment `variable` holding a bus token")
	fs.StringVar(&f.tokenFile, "token-file", "", "`file` holding a bus token")
	fs.StringVar(&f.nkey, "nkey", "", "NKey seed `file`")
	fs.StringVar(&f.creds, "creds", "", "credentials (JWT) `file`")
	fs.StringVar(&f.tlsCA, "tls-ca", "", "CA certificate `file` to verify the server")
	fs.StringVar(&f.tlsCert, "tls-cert", "", "client certificate `file`")
	fs.StringVar(&f.tlsKey, "tls-key", "", "client key `file`")
	if err := fs.Parse(args); err != nil {
		return errUsage
	}
	if fs.NArg() > 0 {
		fmt.Fprintf(stderr, "listen: unexpected argument %q\n", fs.Arg(0))
		return errUsage
	}
	subject, err := listenSubject(f)
	if err != nil {
		return err
	}
	opts, err := f.connectOptions(os.Getenv)
	if err != nil {
		return fmt.Errorf("listen: %w", err)
	}
	errw := &lockedWriter{w: stderr}
	opts = append(opts, nats.Name("stillwater listen"), nats.MaxReconnects(-1), nats.ReconnectWait(time.Second),
		nats.DisconnectErrHandler(func(_ *nats.Conn, err error) {
			if err != nil {
				fmt.Fprintf(errw, "listen: disconnected: %v; reconnecting\n", err)
			}
		}),
		nats.ReconnectHandler(func(nc *nats.Conn) { fmt.Fprintf(errw, "listen: reconnected to %s\n", nc.ConnectedUrlRedacted()) }),
		nats.ErrorHandler(func(_ *nats.Conn, _ *nats.Subscription, err error) { fmt.Fprintf(errw, "listen: %v\n", err) }))
	nc, err := nats.Connect(f.url, opts...)
	if err != nil {
		return fmt.Errorf("listen: connect %s: %w", config.BusRedactList(f.url), err)
	}
	defer nc.Close()
	sub, err := nc.SubscribeSync(subject)
	if err != nil {
		return fmt.Errorf("listen: subscribe %s: %w", subject, err)
	}
	if err := nc.FlushTimeout(5 * time.Second); err != nil {
		return fmt.Errorf("listen: subscribe %s: %w", subject, err)
	}
	fmt.Fprintf(errw, "listening on %s at %s\n", subject, nc.ConnectedUrlRedacted())
	for n := 0; f.count == 0 || n < f.count; {
		m, err := sub.NextMsgWithContext(ctx)
		if err != nil {
			if ctx.Err() != nil {
				return nil
			}
			return fmt.Errorf("listen: %w", err)
		}
		if isControlSubject(m.Subject, f.prefix) {
			continue // requests, not messages; they may carry a token
		}
		if f.json {
			fmt.Fprintf(stdout, "%s\n", m.Data)
		} else {
			line, err := formatMessage(m.Data)
			if err != nil {
				fmt.Fprintf(errw, "listen: %s: unreadable message (%v): %.200q\n", m.Subject, err, m.Data)
				continue
			}
			fmt.Fprintln(stdout, line)
		}
		n++
	}
	return nil
}

func listenSubject(f listenFlags) (string, error) {
	if err := alert.ValidToken(f.prefix); err != nil {
		return "", fmt.Errorf("listen -prefix: %v", err)
	}
	if f.camera != "*" {
		if err := alert.ValidToken(f.camera); err != nil {
			return "", fmt.Errorf("listen -camera: %v; give a camera id or *", err)
		}
	}
	switch f.kind {
	case "":
		return f.prefix + "." + f.camera + ".>", nil
	case alert.KindTarget, alert.KindCleared, alert.KindFault, alert.KindArmed, alert.KindBeat:
		return alert.Subject(f.prefix, f.camera, f.kind), nil
	}
	return "", fmt.Errorf("listen -kind %q: want target, cleared, fault, armed or heartbeat", f.kind)
}

func isControlSubject(subject, prefix string) bool {
	return strings.HasPrefix(subject, prefix+".control.")
}

func (f listenFlags) connectOptions(getenv func(string) string) ([]nats.Option, error) {
	a := bus.Auth{User: f.user, NKeySeedFile: f.nkey, CredsFile: f.creds, CAFile: f.tlsCA, CertFile: f.tlsCert, KeyFile: f.tlsKey}
	pw, _, err := bus.Secret{Env: f.passwordEnv, File: f.passwordFile}.Resolve(getenv)
	if err != nil {
		return nil, fmt.Errorf("password: %w", err)
	}
	tok, _, err := bus.Secret{Env: f.tokenEnv, File: f.tokenFile}.Resolve(getenv)
	if err != nil {
		return nil, fmt.Errorf("token: %w", err)
	}
	a.Password, a.Token = pw, tok
	return bus.ConnectOptions(a)
}

// lockedWriter serialises writes from the NATS callback goroutines.
type lockedWriter struct {
	mu sync.Mutex
	w  io.Writer
}

func (l *lockedWriter) Write(p []byte) (int, error) {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.w.Write(p)
}

// listenTime is how times are printed: UTC to the millisecond.
const listenTime = "2006-01-02 15:04:05.000Z"

// formatMessage renders one wire message as a line of text.
func formatMessage(data []byte) (string, error) {
	var head struct {
		V    int    `json:"v"`
		Kind string `json:"kind"`
	}
	if err := json.Unmarshal(data, &head); err != nil {
		return "", err
	}
	if head.V != alert.Version {
		return "", fmt.Errorf("wire version %d, this listener reads %d", head.V, alert.Version)
	}
	switch head.Kind {
	case alert.KindTarget:
		var m alert.Target
		if err := json.Unmarshal(data, &m); err != nil {
			return "", err
		}
		s := fmt.Sprintf("%s %s target %s track=%d seq=%d surface=%.2f,%.2fm floor=%.2f,%.2fm depth=%.2fm area=%.3fm2 velocity=%.2f,%.2fm/s dwell=%.1fs confidence=%.2f",
			m.Time.UTC().Format(listenTime), m.Camera, m.Event, m.Track, m.Seq, m.Surface.X, m.Surface.Y, m.Floor.X, m.Floor.Y, m.Floor.Depth,
			m.Area, m.Velocity.X, m.Velocity.Y, m.Dwell, m.Confidence)
		if m.Evidence != "" {
			s += " evidence=" + m.Evidence
		}
		return s, nil
	case alert.KindCleared:
		var m alert.Cleared
		if err := json.Unmarshal(data, &m); err != nil {
			return "", err
		}
		return fmt.Sprintf("%s %s cleared track=%d seq=%d last=%.2f,%.2fm lasted=%.1fs",
			m.Time.UTC().Format(listenTime), m.Camera, m.Track, m.Seq, m.Last.X, m.Last.Y, m.Duration), nil
	case alert.KindFault:
		var m alert.Fault
		if err := json.Unmarshal(data, &m); err != nil {
			return "", err
		}
		state := "RAISED"
		if !m.Active {
			state = "ended"
		}
		s := fmt.Sprintf("%s %s fault %s %s seq=%d", m.Time.UTC().Format(listenTime), m.Camera, m.Fault, state, m.Seq)
		if m.Shift != nil {
			s += fmt.Sprintf(" shift=%.2fm", *m.Shift)
		}
		return s + ": " + m.Message, nil
	case alert.KindArmed:
		var m alert.ArmedChange
		if err := json.Unmarshal(data, &m); err != nil {
			return "", err
		}
		state := "DISARMED"
		if m.Armed {
			state = "ARMED"
		}
		s := fmt.Sprintf("%s %s %s: %s", m.Time.UTC().Format(listenTime), m.Camera, state, m.Reason)
		if m.Until != nil {
			s += " until=" + m.Until.UTC().Format(time.RFC3339)
		}
		if m.By != "" {
			s += " by=" + m.By
		}
		return s, nil
	case alert.KindBeat:
		var m alert.Heartbeat
		if err := json.Unmarshal(data, &m); err != nil {
			return "", err
		}
		return fmt.Sprintf("%s %s heartbeat fps=%.1f camera_ok=%t armed=%t version=%s",
			m.Time.UTC().Format(listenTime), m.Camera, m.FPS, m.CameraOK, m.Armed, m.Version), nil
	}
	return "", errors.New("unknown kind " + fmt.Sprintf("%q", head.Kind))
}
