package alert

import (
	"context"
	"errors"
	"fmt"
	"net"
	"strconv"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"
)

// EmbeddedConfig sets up the in-process NATS server.
type EmbeddedConfig struct {
	// Listen is host:port for clients; port -1 picks a free one. The host
	// defaults to 127.0.0.1.
	Listen string
	// StoreDir holds JetStream's file store.
	StoreDir string
	// Name is the server name (JetStream and MQTT need one).
	Name string
	// MQTT is host:port for the MQTT listener; empty leaves it off.
	MQTT string
}

// Embedded is a running in-process NATS server.
type Embedded struct {
	srv *server.Server
}

// StartEmbedded starts a NATS server with JetStream in this process and
// waits until it accepts clients.
func StartEmbedded(cfg EmbeddedConfig) (*Embedded, error) {
	host, port, err := splitListen(cfg.Listen, 4222)
	if err != nil {
		return nil, fmt.Errorf("embedded bus listen %q: %w", cfg.Listen, err)
	}
	name := cfg.Name
	if name == "" {
		name = "stillwater"
	}
	opts := &server.Options{
		ServerName: name,
		Host:       host,
		Port:       port,
		JetStream:  true,
		StoreDir:   cfg.StoreDir,
		NoSigs:     true,
		NoLog:      true,
	}
	if cfg.MQTT != "" {
		mh, mp, err := splitListen(cfg.MQTT, 1883)
		if err != nil {
			return nil, fmt.Errorf("embedded bus mqtt %q: %w", cfg.MQTT, err)
		}
		opts.MQTT.Host, opts.MQTT.Port = mh, mp
	}
	srv, err := server.NewServer(opts)
	if err != nil {
		return nil, fmt.Errorf("embedded bus: %w", err)
	}
	srv.Start()
	if !srv.ReadyForConnections(10 * time.Second) {
		srv.Shutdown()
		return nil, errors.New("embedded bus: not ready within 10 s")
	}
	return &Embedded{srv: srv}, nil
}

// URL returns the client URL of the server.
func (e *Embedded) URL() string { return e.srv.ClientURL() }

// Shutdown stops the server and waits for it to finish.
func (e *Embedded) Shutdown() {
	e.srv.Shutdown()
	e.srv.WaitForShutdown()
}

func splitListen(s string, def int) (string, int, error) {
	if s == "" {
		return "127.0.0.1", def, nil
	}
	h, p, err := net.SplitHostPort(s)
	if err != nil {
		return "", 0, err
	}
	if h == "" {
		h = "127.0.0.1"
	}
	n, err := strconv.Atoi(p)
	if err != nil || n < -1 || n > 65535 {
		return "", 0, fmt.Errorf("port %q is not a number from -1 to 65535", p)
	}
	return h, n, nil
}

// StreamConfig describes the JetStream stream that keeps alarm messages.
type StreamConfig struct {
	Name     string        // default STILLWATER
	MaxAge   time.Duration // default 30 days
	MaxBytes int64         // default 256 MiB
}

// Publisher sends messages to subjects under a prefix. Targets, cleared
// and faults go through JetStream with a de-duplication id and wait for
// the acknowledgement; others are plain publishes.
type Publisher struct {
	nc     *nats.Conn
	js     jetstream.JetStream
	prefix string
}

// NewPublisher makes sure the stream exists and returns a publisher on nc.
func NewPublisher(ctx context.Context, nc *nats.Conn, prefix string, sc StreamConfig) (*Publisher, error) {
	js, err := jetstream.New(nc)
	if err != nil {
		return nil, fmt.Errorf("publisher: %w", err)
	}
	if sc.Name == "" {
		sc.Name = "STILLWATER"
	}
	if sc.MaxAge == 0 {
		sc.MaxAge = 30 * 24 * time.Hour
	}
	if sc.MaxBytes == 0 {
		sc.MaxBytes = 256 << 20
	}
	_, err = js.CreateOrUpdateStream(ctx, jetstream.StreamConfig{
		Name:       sc.Name,
		Subjects:   []string{prefix + ".*." + KindTarget, prefix + ".*." + KindCleared, prefix + ".*." + KindFault},
		Storage:    jetstream.FileStorage,
		MaxAge:     sc.MaxAge,
		MaxBytes:   sc.MaxBytes,
		Duplicates: 2 * time.Minute,
	})
	if err != nil {
		return nil, fmt.Errorf("publisher: create stream %s: %w", sc.Name, err)
	}
	return &Publisher{nc: nc, js: js, prefix: prefix}, nil
}

// Publish sends data for camera and kind; id de-duplicates retries.
func (p *Publisher) Publish(ctx context.Context, camera, kind, id string, data []byte) error {
	subj := Subject(p.prefix, camera, kind)
	switch kind {
	case KindTarget, KindCleared, KindFault:
		if _, err := p.js.Publish(ctx, subj, data, jetstream.WithMsgID(id)); err != nil {
			return fmt.Errorf("publish %s: %w", subj, err)
		}
		return nil
	default:
		if err := p.nc.Publish(subj, data); err != nil {
			return fmt.Errorf("publish %s: %w", subj, err)
		}
		return nil
	}
}

// Flush waits until the server has processed everything sent so far.
func (p *Publisher) Flush(ctx context.Context) error { return p.nc.FlushWithContext(ctx) }
