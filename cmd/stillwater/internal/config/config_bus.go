package config

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"log/slog"
	"net/url"
	"os"
	"path/filepath"
	"strings"
	"syscall"
	"time"

	"github.com/nats-io/nats.go"
	"golang.org/x/sync/errgroup"

	"stillwater/alert"
	"stillwater/alert/arming"
	"stillwater/alert/bus"
)

// BusConfig selects the message bus: the embedded server when neither url
// nor urls is set.
type BusConfig struct {
	URL    string   `yaml:"url"`
	URLs   []string `yaml:"urls"`   // more servers of the same cluster; joined with url
	Listen string   `yaml:"listen"` // embedded server's client listener
	MQTT   string   `yaml:"mqtt"`   // embedded server's MQTT listener; empty is off, host defaults to 127.0.0.1
	Prefix string   `yaml:"subject_prefix"`

	// Auth is how the daemon logs in. With the embedded server and users
	// it may stay empty: the daemon then uses the first daemon-role user.
	Auth BusAuthConfig `yaml:"auth"`
	TLS  BusTLSConfig  `yaml:"tls"`

	// Users turn on authentication in the embedded server.
	Users []BusUserConfig `yaml:"users"`
	// Leaf makes the embedded server join central servers as a leaf node.
	Leaf []LeafConfig `yaml:"leaf"`
	// JetStreamDomain of the embedded server; defaults to "stillwater"
	// when leaf is set.
	JetStreamDomain string `yaml:"jetstream_domain"`

	Stream StreamSection `yaml:"stream"`
	Outbox OutboxSection `yaml:"outbox"`
}

// BusAuthConfig holds at most one way to log in. Secrets come from
// *_env (an environment variable's name) or *_file (a file's path);
// inline password and token work but are reported as a warning.
type BusAuthConfig struct {
	User         string `yaml:"user"`
	Password     string `yaml:"password"`
	PasswordEnv  string `yaml:"password_env"`
	PasswordFile string `yaml:"password_file"`
	Token        string `yaml:"token"`
	TokenEnv     string `yaml:"token_env"`
	TokenFile    string `yaml:"token_file"`
	NKeySeedFile string `yaml:"nkey_seed_file"`
	CredsFile    string `yaml:"creds_file"`
}

// BusTLSConfig verifies the server (ca_file) and presents a client
// certificate (cert_file + key_file).
type BusTLSConfig struct {
	CAFile   string `yaml:"ca_file"`
	CertFile string `yaml:"cert_file"`
	KeyFile  string `yaml:"key_file"`
}

// BusUserConfig is a user of the embedded server.
type BusUserConfig struct {
	Name         string `yaml:"name"`
	Role         string `yaml:"role"`     // daemon, responder or operator
	Password     string `yaml:"password"` // plain (warned) or a bcrypt hash
	PasswordEnv  string `yaml:"password_env"`
	PasswordFile string `yaml:"password_file"`
}

// LeafConfig is one central cluster the embedded server joins.
type LeafConfig struct {
	URLs      []string `yaml:"urls"`
	CredsFile string   `yaml:"creds_file"`
	CAFile    string   `yaml:"ca_file"`
	CertFile  string   `yaml:"cert_file"`
	KeyFile   string   `yaml:"key_file"`
}

// StreamSection sizes the JetStream stream; zero values take the bus package's
// defaults (30 days, 256 MiB, 1 h de-duplication, 1 replica).
type StreamSection struct {
	Name       string   `yaml:"name"`
	MaxAge     Duration `yaml:"max_age"`
	MaxBytes   int64    `yaml:"max_bytes"`
	Duplicates Duration `yaml:"duplicates"`
	Replicas   int      `yaml:"replicas"`
	// Consumers names bus users for whom stillwater keeps a durable
	// consumer on the stream, so that they catch up after being away.
	// With the embedded server every responder and operator user has one
	// whether listed or not; list the users of an external server here.
	Consumers []string `yaml:"consumers"`
}

// OutboxSection bounds the on-disk queue of unacknowledged messages;
// zero values take the bus package's defaults (10000 messages, 16 MiB, 2 s,
// and 64 MiB for the dead-letter file).
type OutboxSection struct {
	MaxMessages        int      `yaml:"max_messages"`
	MaxBytes           int64    `yaml:"max_bytes"`
	AckTimeout         Duration `yaml:"ack_timeout"`
	DeadLetterMaxBytes int64    `yaml:"dead_letter_max_bytes"`
}

// Embedded reports whether the daemon runs its own server.
func (b BusConfig) Embedded() bool { return b.URL == "" && len(b.URLs) == 0 }

// ServerURLs is the comma-joined list nats.Connect takes.
func (b BusConfig) ServerURLs() string {
	var all []string
	if b.URL != "" {
		all = append(all, b.URL)
	}
	return strings.Join(append(all, b.URLs...), ",")
}

// validateBus checks the bus section. It reads no files and no
// environment: secrets are resolved when the daemon starts.
func validateBus(b BusConfig) error {
	if b.Embedded() && b.Listen == "" {
		return errors.New("bus: neither url nor listen is set; set url for an external server or listen for the embedded one")
	}
	if err := alert.ValidToken(b.Prefix); err != nil {
		return fmt.Errorf("bus.subject_prefix: %v; use a single word such as stillwater", err)
	}
	for i, s := range append([]string{b.URL}, b.URLs...) {
		if s == "" {
			continue
		}
		field := "bus.url"
		if i > 0 {
			field = fmt.Sprintf("bus.urls[%d]", i-1)
		}
		if err := checkBusURL(s, "nats", "tls", "ws", "wss"); err != nil {
			return fmt.Errorf("%s: %v; write e.g. nats://bus.example:4222", field, err)
		}
	}
	if !b.Embedded() {
		switch {
		case b.MQTT != "":
			return errors.New("bus.mqtt: only the embedded server has an MQTT listener; remove it or clear bus.url")
		case len(b.Users) > 0:
			return errors.New("bus.users: only the embedded server takes users; configure users on the external server")
		case len(b.Leaf) > 0:
			return errors.New("bus.leaf: only the embedded server joins as a leaf node; remove it or clear bus.url")
		}
	}
	if err := validateBusAuth(b.Auth); err != nil {
		return err
	}
	if (b.TLS.CertFile == "") != (b.TLS.KeyFile == "") {
		return errors.New("bus.tls: cert_file and key_file go together; set both or neither")
	}
	daemonUser := false
	names := map[string]bool{}
	for i, u := range b.Users {
		where := fmt.Sprintf("bus.users[%d]", i)
		if err := alert.ValidToken(u.Name); err != nil {
			return fmt.Errorf("%s.name: %v", where, err)
		}
		if u.Role != bus.RoleDaemon {
			// The name becomes a subject token and the author of overrides.
			if err := bus.ValidUserName(u.Name); err != nil {
				return fmt.Errorf("%s.name: %v", where, err)
			}
		}
		if names[u.Name] {
			return fmt.Errorf("%s.name: %q is used twice", where, u.Name)
		}
		names[u.Name] = true
		switch u.Role {
		case bus.RoleDaemon:
			daemonUser = true
		case bus.RoleResponder, bus.RoleOperator:
		default:
			return fmt.Errorf("%s (%s).role: %q; want daemon, responder or operator", where, u.Name, u.Role)
		}
		if err := oneSecretSource(u.Password, u.PasswordEnv, u.PasswordFile, true); err != nil {
			return fmt.Errorf("%s (%s): password: %v", where, u.Name, err)
		}
	}
	if len(b.Users) > 0 && !daemonUser && b.Auth.User == "" {
		return errors.New("bus.users: no user has role daemon, so stillwater itself could not log in; add one")
	}
	for i, l := range b.Leaf {
		where := fmt.Sprintf("bus.leaf[%d]", i)
		if len(l.URLs) == 0 {
			return fmt.Errorf("%s.urls: empty; list the central cluster's leaf-node URLs, e.g. nats-leaf://hub.example:7422", where)
		}
		for j, s := range l.URLs {
			if err := checkBusURL(s, "nats-leaf", "nats", "tls", "ws", "wss"); err != nil {
				return fmt.Errorf("%s.urls[%d]: %v", where, j, err)
			}
		}
		if (l.CertFile == "") != (l.KeyFile == "") {
			return fmt.Errorf("%s: cert_file and key_file go together", where)
		}
	}
	s := b.Stream
	switch {
	case s.Name != "" && alert.ValidToken(s.Name) != nil:
		return fmt.Errorf("bus.stream.name: %q; use letters, digits, - and _", s.Name)
	case s.MaxAge < 0 || s.MaxBytes < 0 || s.Duplicates < 0:
		return errors.New("bus.stream: max_age, max_bytes and duplicates must not be negative")
	case s.Replicas < 0 || s.Replicas > 5:
		return fmt.Errorf("bus.stream.replicas: %d; JetStream keeps 1 to 5 copies", s.Replicas)
	case s.MaxAge > 0 && s.Duplicates > s.MaxAge:
		return errors.New("bus.stream.duplicates: longer than max_age; make it shorter")
	}
	listed := map[string]bool{}
	for i, name := range s.Consumers {
		if err := bus.ValidUserName(name); err != nil {
			return fmt.Errorf("bus.stream.consumers[%d]: %v; name the bus user that reads it", i, err)
		}
		if listed[name] {
			return fmt.Errorf("bus.stream.consumers[%d]: %q is listed twice", i, name)
		}
		listed[name] = true
	}
	o := b.Outbox
	switch {
	case o.MaxMessages < 0 || o.MaxBytes < 0:
		return errors.New("bus.outbox: max_messages and max_bytes must not be negative")
	case o.DeadLetterMaxBytes < 0:
		return fmt.Errorf("bus.outbox.dead_letter_max_bytes: %d; want 0 (default 64 MiB) or a positive number of bytes", o.DeadLetterMaxBytes)
	case o.AckTimeout < 0 || time.Duration(o.AckTimeout) > 30*time.Second:
		return errors.New("bus.outbox.ack_timeout: want 0 (default 2s) up to 30s; the camera loop waits this long at most")
	}
	return nil
}

func validateBusAuth(a BusAuthConfig) error {
	kinds := 0
	pw := a.Password != "" || a.PasswordEnv != "" || a.PasswordFile != ""
	if a.User != "" || pw {
		if a.User == "" || !pw {
			return errors.New("bus.auth: user and a password (password_env, password_file or password) go together")
		}
		if err := oneSecretSource(a.Password, a.PasswordEnv, a.PasswordFile, false); err != nil {
			return fmt.Errorf("bus.auth password: %v", err)
		}
		kinds++
	}
	if a.Token != "" || a.TokenEnv != "" || a.TokenFile != "" {
		if err := oneSecretSource(a.Token, a.TokenEnv, a.TokenFile, false); err != nil {
			return fmt.Errorf("bus.auth token: %v", err)
		}
		kinds++
	}
	if a.NKeySeedFile != "" {
		kinds++
	}
	if a.CredsFile != "" {
		kinds++
	}
	if kinds > 1 {
		return errors.New("bus.auth: use one of user/password, token, nkey_seed_file or creds_file")
	}
	return nil
}

// oneSecretSource checks that at most one (or, if required, exactly one) source
// is given.
func oneSecretSource(inline, env, file string, required bool) error {
	n := 0
	for _, v := range []string{inline, env, file} {
		if v != "" {
			n++
		}
	}
	switch {
	case n > 1:
		return errors.New("give it one way only: inline, *_env or *_file")
	case n == 0 && required:
		return errors.New("missing; set password_env or password_file")
	}
	return nil
}

func checkBusURL(s string, schemes ...string) error {
	u, err := url.Parse(s)
	if err != nil || u.Host == "" {
		return fmt.Errorf("%q is not a URL with a host", busRedact(s))
	}
	for _, sc := range schemes {
		if u.Scheme == sc {
			return nil
		}
	}
	return fmt.Errorf("scheme %q; want one of %s", u.Scheme, strings.Join(schemes, ", "))
}

func busRedact(s string) string {
	if u, err := url.Parse(s); err == nil && u.User != nil {
		return u.Redacted()
	}
	if i := strings.LastIndex(s, "@"); i >= 0 {
		return "…" + s[i:]
	}
	return s
}

// ResolveSecret resolves one secret through bus.Secret; inline secrets add a
// warning naming the field.
func ResolveSecret(field, inline, env, file string, getenv func(string) string, warn *[]string) (string, error) {
	v, isInline, err := bus.Secret{Value: inline, Env: env, File: file}.Resolve(getenv)
	if err != nil {
		return "", fmt.Errorf("%s: %w", field, err)
	}
	if isInline && !strings.HasPrefix(v, "$2") { // a bcrypt hash is no secret to hide
		*warn = append(*warn, field+" is written in the config file; prefer "+field+"_env or "+field+"_file")
	}
	return v, nil
}

// connectOptions returns the nats.Options of the daemon's connection and
// warnings to log. With the embedded server, users and no auth section,
// the first daemon-role user logs in.
func (b BusConfig) connectOptions(getenv func(string) string) ([]nats.Option, []string, error) {
	var warn []string
	a := b.Auth
	auth := bus.Auth{User: a.User, NKeySeedFile: a.NKeySeedFile, CredsFile: a.CredsFile,
		CAFile: b.TLS.CAFile, CertFile: b.TLS.CertFile, KeyFile: b.TLS.KeyFile}
	var err error
	if auth.Password, err = ResolveSecret("bus.auth.password", a.Password, a.PasswordEnv, a.PasswordFile, getenv, &warn); err != nil {
		return nil, nil, err
	}
	if auth.Token, err = ResolveSecret("bus.auth.token", a.Token, a.TokenEnv, a.TokenFile, getenv, &warn); err != nil {
		return nil, nil, err
	}
	if b.Embedded() && auth.User == "" && auth.Token == "" && auth.NKeySeedFile == "" && auth.CredsFile == "" {
		for i, u := range b.Users {
			if u.Role != bus.RoleDaemon {
				continue
			}
			pw, err := ResolveSecret(fmt.Sprintf("bus.users[%d].password", i), u.Password, u.PasswordEnv, u.PasswordFile, getenv, &warn)
			if err != nil {
				return nil, nil, err
			}
			if strings.HasPrefix(pw, "$2") {
				return nil, nil, fmt.Errorf("bus.users[%d] (%s): a bcrypt hash cannot log in; give stillwater the plain password in bus.auth", i, u.Name)
			}
			auth.User, auth.Password = u.Name, pw
			break
		}
	}
	opts, err := bus.ConnectOptions(auth)
	if err != nil {
		return nil, nil, err
	}
	return opts, warn, nil
}

// embeddedConfig returns the embedded server's configuration, secrets
// resolved, and warnings to log.
func (b BusConfig) embeddedConfig(dataDir string, getenv func(string) string) (bus.EmbeddedConfig, []string, error) {
	var warn []string
	ec := bus.EmbeddedConfig{Listen: b.Listen, StoreDir: filepath.Join(dataDir, "jetstream"), MQTT: b.MQTT,
		Prefix: b.Prefix, Stream: b.Stream.Name, Domain: b.JetStreamDomain}
	for i, u := range b.Users {
		pw, err := ResolveSecret(fmt.Sprintf("bus.users[%d].password", i), u.Password, u.PasswordEnv, u.PasswordFile, getenv, &warn)
		if err != nil {
			return bus.EmbeddedConfig{}, nil, err
		}
		ec.Users = append(ec.Users, bus.User{Name: u.Name, Password: pw, Role: u.Role})
	}
	for _, l := range b.Leaf {
		ec.Leaf = append(ec.Leaf, bus.LeafRemote{URLs: l.URLs, CredsFile: l.CredsFile, CAFile: l.CAFile, CertFile: l.CertFile, KeyFile: l.KeyFile})
	}
	if b.MQTT != "" && len(b.Users) == 0 && !strings.HasPrefix(b.MQTT, "127.") && !strings.HasPrefix(b.MQTT, "localhost:") && !strings.HasPrefix(b.MQTT, ":") && !strings.HasPrefix(b.MQTT, "[::1]") {
		warn = append(warn, "bus.mqtt listens beyond loopback without bus.users: anyone on the network can read the alarms")
	}
	return ec, warn, nil
}

// publisherConfig returns the publisher's configuration without its
// callbacks, which the daemon adds (metrics, log).
func (b BusConfig) publisherConfig(dataDir string) bus.PublisherConfig {
	return bus.PublisherConfig{
		Prefix: b.Prefix,
		Stream: bus.StreamConfig{Name: b.Stream.Name, MaxAge: time.Duration(b.Stream.MaxAge), MaxBytes: b.Stream.MaxBytes,
			Duplicates: time.Duration(b.Stream.Duplicates), Replicas: b.Stream.Replicas},
		Outbox:     bus.OutboxConfig{Dir: filepath.Join(dataDir, "outbox"), MaxMessages: b.Outbox.MaxMessages, MaxBytes: b.Outbox.MaxBytes, DeadLetterMaxBytes: b.Outbox.DeadLetterMaxBytes},
		AckTimeout: time.Duration(b.Outbox.AckTimeout),
		Consumers:  b.Consumers(),
	}
}

// Consumers names the durable consumers to keep: every responder and
// operator of the embedded server, then those listed, each once.
func (b BusConfig) Consumers() []string {
	var out []string
	seen := map[string]bool{}
	add := func(name string) {
		if !seen[name] {
			seen[name] = true
			out = append(out, name)
		}
	}
	if b.Embedded() {
		for _, u := range b.Users {
			if u.Role == bus.RoleResponder || u.Role == bus.RoleOperator {
				add(u.Name)
			}
		}
	}
	for _, name := range b.Stream.Consumers {
		add(name)
	}
	return out
}

// ControlConfig is who may arm and disarm, over HTTP and NATS. The
// secret is a bearer token; give it as secret_env or secret_file (inline
// secret works and is warned about).
type ControlConfig struct {
	Secret     string `yaml:"secret"`
	SecretEnv  string `yaml:"secret_env"`
	SecretFile string `yaml:"secret_file"`
	// TokenName is who a request carrying the secret is recorded as in
	// the override's by ("http:NAME"); default token-holder.
	TokenName string `yaml:"token_name"`
	// TrustNATS accepts NATS control requests without the token on a bus
	// user's own subject, PREFIX.control.USER.ACTION, and records them as
	// "nats:USER": the operator role lets only USER publish there. Needs
	// bus.users, or an external server whose permissions do the same.
	TrustNATS bool `yaml:"trust_nats"`
	// MaxDisarm is the longest disarm accepted; default 24h, at most 7 days.
	MaxDisarm Duration `yaml:"max_disarm"`
}

// validateControl checks the control section against the bus section.
func validateControl(c ControlConfig, b BusConfig) error {
	if err := oneSecretSource(c.Secret, c.SecretEnv, c.SecretFile, false); err != nil {
		return fmt.Errorf("control.secret: %v", err)
	}
	if c.TrustNATS && b.Embedded() && len(b.Users) == 0 {
		return errors.New("control.trust_nats: the embedded server has no bus.users, so anyone on the bus could disarm; add users with roles or drop trust_nats")
	}
	if c.MaxDisarm < 0 || time.Duration(c.MaxDisarm) > 7*24*time.Hour {
		return errors.New("control.max_disarm: want 0 (default 24h) up to 168h")
	}
	return nil
}

// controlSecret resolves the control secret; warnings are to be logged.
func (c ControlConfig) controlSecret(getenv func(string) string) (string, []string, error) {
	var warn []string
	s, err := ResolveSecret("control.secret", c.Secret, c.SecretEnv, c.SecretFile, getenv, &warn)
	return s, warn, err
}

// BusHooks are the daemon's callbacks into its metrics; any may be nil.
type BusHooks struct {
	OnResult  func(bus.PublishResult)        // stillwater_publish_seconds, publish errors
	OnBacklog func(active bool, s bus.Stats) // bus_backlog fault
	OnRefused func(via string)               // stillwater_control_refused_total{via}
}

// BusParts is the bus side of the daemon, opened by openBus. Run drives
// it; Close releases it after Run has returned.
type BusParts struct {
	dirLock  *os.File // the data directory's lock, held until Close
	cfg      BusConfig
	Embedded *bus.Embedded // nil with an external server
	URL      string        // redacted
	Conn     *nats.Conn
	Pub      *bus.Publisher
	Arming   *arming.Arming
	Control  *arming.Control
	now      func() time.Time
	log      *slog.Logger
}

// OpenBus starts the embedded server (unless bus.url is set), connects,
// opens the publisher with its outbox in data_dir/outbox, the per-camera
// arming with its state in data_dir/arming.json and the control API. An
// external server that is down is not an error: messages wait in the
// outbox. An unreadable arming state is logged and every camera runs
// armed. The caller sets ac's cameras and schedules.
func OpenBus(ctx context.Context, cfg Config, ac arming.Config, now func() time.Time, log *slog.Logger, h BusHooks) (_ *BusParts, err error) {
	getenv := os.Getenv
	b := &BusParts{now: now, log: log, cfg: cfg.Bus}
	defer func() {
		if err != nil {
			b.Close()
		}
	}()
	// Before the JetStream store, the outbox or the arming state is
	// opened: a second daemon on the same directory stops here.
	if b.dirLock, err = lockDataDir(cfg.DataDir); err != nil {
		return nil, err
	}
	busURL := cfg.Bus.ServerURLs()
	if cfg.Bus.Embedded() {
		ec, warn, err := cfg.Bus.embeddedConfig(cfg.DataDir, getenv)
		if err != nil {
			return nil, err
		}
		LogWarnings(log, warn)
		if b.Embedded, err = bus.StartEmbedded(ec); err != nil {
			return nil, err
		}
		busURL = b.Embedded.URL()
		log.Info("embedded bus started", "url", busURL, "mqtt", cfg.Bus.MQTT, "users", len(ec.Users), "leaf_remotes", len(ec.Leaf))
	}
	b.URL = BusRedactList(busURL)
	opts, warn, err := cfg.Bus.connectOptions(getenv)
	if err != nil {
		return nil, err
	}
	LogWarnings(log, warn)
	opts = append(opts, nats.Name("stillwater"), nats.MaxReconnects(-1), nats.ReconnectWait(500*time.Millisecond),
		nats.RetryOnFailedConnect(true),
		nats.DisconnectErrHandler(func(_ *nats.Conn, err error) { log.Warn("bus disconnected", "err", err) }),
		nats.ErrorHandler(func(_ *nats.Conn, _ *nats.Subscription, err error) { log.Warn("bus error", "err", err) }),
		nats.ReconnectHandler(func(nc *nats.Conn) { log.Info("bus reconnected", "url", nc.ConnectedUrlRedacted()) }))
	if b.Conn, err = nats.Connect(busURL, opts...); err != nil {
		return nil, fmt.Errorf("connect bus %s: %w", b.URL, err)
	}
	pc := cfg.Bus.publisherConfig(cfg.DataDir)
	pc.OnResult, pc.OnBacklog, pc.Log = h.OnResult, h.OnBacklog, log
	pc.OnStream = b.logStream
	if b.Pub, err = bus.NewPublisherWith(ctx, b.Conn, pc); err != nil {
		return nil, err
	}
	ac.StatePath = filepath.Join(cfg.DataDir, "arming.json")
	ac.MaxDisarm = time.Duration(cfg.Control.MaxDisarm)
	b.Arming, err = arming.New(ac, now())
	if errors.Is(err, arming.ErrStateUnreadable) {
		log.Error("arming state unreadable; every camera is armed until an operator sets the state", "err", err)
	} else if err != nil {
		return nil, err
	}
	secret, warn, err := cfg.Control.controlSecret(getenv)
	if err != nil {
		return nil, err
	}
	LogWarnings(log, warn)
	if secret == "" && !cfg.Control.TrustNATS {
		log.Warn("no control secret configured: arm, disarm and clear requests are refused; set control.secret_env or control.secret_file")
	}
	b.Control, err = arming.NewControl(arming.ControlConfig{Prefix: cfg.Bus.Prefix, Arming: b.Arming, Secret: secret, TokenName: cfg.Control.TokenName,
		TrustNATS: cfg.Control.TrustNATS, OnRefused: h.OnRefused, Log: log, Now: now})
	if err != nil {
		return nil, err
	}
	return b, nil
}

// LogWarnings logs each warning of a secret's resolution.
func LogWarnings(log *slog.Logger, warn []string) {
	for _, w := range warn {
		log.Warn(w)
	}
}

// Run drains the outbox, answers control requests and publishes armed
// changes until ctx ends. Cancel it after the cameras have stopped and
// Pub.Flush has run, so that nothing queued is left behind needlessly.
func (b *BusParts) Run(ctx context.Context) error {
	g, gctx := errgroup.WithContext(ctx)
	g.Go(func() error { return b.Pub.Run(gctx) })
	g.Go(func() error { return b.Control.Serve(gctx, b.Conn) })
	g.Go(func() error {
		return b.Arming.Run(gctx, b.now, time.Second, func(c alert.ArmedChange) {
			b.log.Info("armed state", "camera", c.Camera, "armed", c.Armed, "reason", c.Reason)
			if err := b.Pub.PublishArmed(gctx, c); err != nil {
				b.log.Error("publish armed change", "camera", c.Camera, "err", err)
			}
		})
	})
	return g.Wait()
}

// Close releases the outbox, the connection, the embedded server and the
// data directory, in that order. Safe on a partly opened busParts.
func (b *BusParts) Close() {
	defer func() {
		if b.dirLock != nil {
			b.dirLock.Close()
			b.dirLock = nil
		}
	}()
	if b.Pub != nil {
		if err := b.Pub.Close(); err != nil {
			b.log.Error("close outbox", "err", err)
		}
	}
	if b.Conn != nil {
		b.Conn.Close()
	}
	if b.Embedded != nil {
		b.Embedded.Shutdown()
	}
}

// busStallAfter is how old the oldest queued message may be before the
// daemon reports itself not ready: longer than a server restart or a
// cluster's leader election takes, far shorter than the 20 s from entry
// to alarm that ASTM F2208 allows twice over.
const busStallAfter = 30 * time.Second

// Problems lists why the bus side is not ready, beyond the connection
// itself (which readiness reports): a stream that cannot be created or
// used, and a queue whose oldest message is older than busStallAfter.
// Empty means ready.
func (b *BusParts) Problems(now time.Time) []string {
	var out []string
	if err := b.Pub.StreamFault(); err != nil {
		out = append(out, fmt.Sprintf("bus: %v; %s", err, b.streamAdvice(err)))
	}
	if age, stalled := b.Stalled(now); stalled {
		out = append(out, fmt.Sprintf("bus: oldest queued message is %.0f s old, over the %.0f s bound; %d messages wait in the outbox",
			age.Seconds(), busStallAfter.Seconds(), b.Pub.Stats().Depth))
	}
	return out
}

// Stalled returns the age of the oldest queued message and whether it is
// over busStallAfter.
func (b *BusParts) Stalled(now time.Time) (time.Duration, bool) {
	oldest := b.Pub.Stats().Oldest
	if oldest.IsZero() {
		return 0, false
	}
	age := now.Sub(oldest)
	return age, age > busStallAfter
}

// streamAdvice says which setting or server object to change for a stream
// fault.
func (b *BusParts) streamAdvice(err error) string {
	var c *bus.StreamConflictError
	if !errors.As(err, &c) {
		return "check that the server has JetStream enabled with room for the stream (bus.stream.max_bytes, bus.stream.replicas) and that stillwater's bus user may use $JS.API"
	}
	if c.Earlier != "" {
		return fmt.Sprintf("set bus.stream.name: %s to use the stream an earlier run made with these subjects, or remove stream %s from the server (its stored messages go with it)",
			c.Earlier, c.Earlier)
	}
	held := "other streams"
	if len(c.Owners) > 0 {
		held = "stream " + strings.Join(c.Owners, ", ")
	}
	return fmt.Sprintf("choose another bus.subject_prefix, or remove or narrow %s on the server so that %s.* is free", held, b.cfg.Prefix)
}

// logStream is the publisher's OnStream: a stream fault is an ERROR that
// says what to change; its end is logged too.
func (b *BusParts) logStream(err error) {
	name := b.cfg.Stream.Name
	if name == "" {
		name = "STILLWATER"
	}
	if err == nil {
		b.log.Info("bus stream ready", "stream", name)
		return
	}
	attrs := []any{"stream", name}
	var c *bus.StreamConflictError
	if errors.As(err, &c) {
		attrs = append(attrs, "subjects", strings.Join(c.Subjects, " "), "held_by", strings.Join(c.Owners, " "))
	}
	attrs = append(attrs, "fix", b.streamAdvice(err), "err", err)
	b.log.Error("bus stream cannot be created; messages are stored only if another stream takes their subjects, else they wait in the outbox", attrs...)
}

// lockDataDir takes the data directory's lock file, stillwater.lock, with
// this process's id in it. It fails when another process holds it.
func lockDataDir(dir string) (*os.File, error) {
	if err := os.MkdirAll(dir, 0o750); err != nil {
		return nil, fmt.Errorf("data_dir %s: %w", dir, err)
	}
	path := filepath.Join(dir, "stillwater.lock")
	f, err := os.OpenFile(path, os.O_CREATE|os.O_RDWR, 0o640)
	if err != nil {
		return nil, fmt.Errorf("data_dir %s: lock: %w", dir, err)
	}
	if err := syscall.Flock(int(f.Fd()), syscall.LOCK_EX|syscall.LOCK_NB); err != nil {
		holder := ""
		if b, rerr := os.ReadFile(path); rerr == nil && len(bytes.TrimSpace(b)) > 0 {
			holder = " by process " + string(bytes.TrimSpace(b))
		}
		f.Close()
		return nil, fmt.Errorf("data_dir %s: another stillwater uses it (%s is locked%s: %v); give each daemon its own data_dir", dir, path, holder, err)
	}
	if err := f.Truncate(0); err == nil {
		fmt.Fprintf(f, "%d\n", os.Getpid())
	}
	return f, nil
}

// BusRedactList redacts each URL of a comma-separated server list.
func BusRedactList(urls string) string {
	parts := strings.Split(urls, ",")
	for i, p := range parts {
		parts[i] = busRedact(strings.TrimSpace(p))
	}
	return strings.Join(parts, ",")
}
