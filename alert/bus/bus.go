package bus

import (
	"errors"
	"fmt"
	"net"
	"net/url"
	"strconv"
	"strings"
	"syscall"
	"time"
	"unicode"

	"github.com/nats-io/nats-server/v2/server"

	"stillwater/alert"
)

// Roles of the embedded server's users. Each maps to NATS publish and
// subscribe permissions under the subject prefix (see rolePermissions);
// MQTT clients log in as the same users with the same permissions.
const (
	// RoleDaemon may publish PREFIX.> (control subjects excepted) and use
	// JetStream: the stillwater daemon itself, which also answers
	// PREFIX.control.>.
	RoleDaemon = "daemon"
	// RoleResponder may subscribe PREFIX.> (but not the control requests),
	// request status on PREFIX.control.status and on its own
	// PREFIX.control.USER.status, and bind and read the durable consumer
	// named after it on the stream (PublisherConfig.Consumers): look it
	// up, pull its messages, acknowledge them. No other JetStream request.
	RoleResponder = "responder"
	// RoleOperator is a responder that may also request arm, disarm and
	// clear: on its own PREFIX.control.USER.ACTION, which only it may
	// publish on so that the daemon can record who asked, and on the
	// shared PREFIX.control.ACTION, where the control token is needed.
	RoleOperator = "operator"
)

// ValidUserName reports whether name can be a bus user of a role other
// than the daemon's: it becomes a subject token (PREFIX.control.USER.…)
// and the author of overrides ("nats:USER"), so 1 to 64 printable
// characters without white space, dots, wildcards or slashes.
func ValidUserName(name string) error {
	if err := alert.ValidToken(name); err != nil {
		return err
	}
	if len(name) > 64 || strings.ContainsAny(name, `/\`) || strings.IndexFunc(name, func(r rune) bool { return !unicode.IsPrint(r) }) >= 0 {
		return fmt.Errorf("%q: want 1 to 64 printable characters without white space, dots, slashes, * or >", name)
	}
	return nil
}

// User is one user of the embedded server. Password may be plain or a
// bcrypt hash ("$2a$..."), which nats-server accepts as such.
type User struct {
	Name     string
	Password string
	Role     string // RoleDaemon, RoleResponder or RoleOperator
}

// LeafRemote is a server the embedded one connects to as a leaf node, so
// that messages published at home also reach a central cluster (and its
// subscribers' interest reaches home).
type LeafRemote struct {
	// URLs of the central cluster's leaf-node listeners, nats-leaf://host:7422
	// or tls://host:7422; user:password@ in the URL is accepted.
	URLs []string
	// CredsFile is a JWT credentials file for the remote account.
	CredsFile string
	// CAFile, CertFile and KeyFile configure TLS to the remote; CertFile
	// and KeyFile go together.
	CAFile, CertFile, KeyFile string
}

// EmbeddedConfig sets up the in-process NATS server.
type EmbeddedConfig struct {
	// Listen is host:port for clients; port -1 picks a free one. The host
	// defaults to 127.0.0.1.
	Listen string
	// StoreDir holds JetStream's file store.
	StoreDir string
	// Name is the server name (JetStream and MQTT need one).
	Name string
	// MQTT is host:port for the MQTT (3.1.1) listener; empty leaves it
	// off. The host defaults to 127.0.0.1 so MQTT stays local unless
	// asked. MQTT clients log in as one of Users with that user's role;
	// topics are the subjects with / for . (PREFIX/CAMERA/KIND, and
	// PREFIX/+/target for every camera's targets).
	MQTT string
	// Prefix is the subject prefix the user roles are written against;
	// required when Users is not empty.
	Prefix string
	// Stream is the name of the stream whose durable consumers responders
	// and operators may read (see PublisherConfig.Consumers); default
	// DefaultStreamName.
	Stream string
	// Users, when not empty, turn on authentication: every client (MQTT
	// too) must log in as one of them.
	Users []User
	// Leaf lists remote servers to join as a leaf node.
	Leaf []LeafRemote
	// Domain is the JetStream domain of this server; it defaults to
	// "stillwater" when Leaf is set, so that the local stream and the
	// central cluster's JetStream do not merge.
	Domain string
}

// Embedded is a running in-process NATS server.
type Embedded struct {
	srv *server.Server
}

// StartEmbedded starts a NATS server with JetStream in this process and
// waits until it accepts clients.
func StartEmbedded(cfg EmbeddedConfig) (*Embedded, error) {
	opts, err := embeddedOptions(cfg)
	if err != nil {
		return nil, err
	}
	// nats-server reports a port it cannot bind only to its own log and
	// then never becomes ready; try the ports first to say which one.
	if err := portFree("client", "bus.listen", opts.Host, opts.Port); err != nil {
		return nil, err
	}
	if err := portFree("MQTT", "bus.mqtt", opts.MQTT.Host, opts.MQTT.Port); err != nil {
		return nil, err
	}
	srv, err := startServer(opts)
	if err != nil {
		return nil, fmt.Errorf("embedded bus (client %s): %w", net.JoinHostPort(opts.Host, strconv.Itoa(opts.Port)), err)
	}
	return &Embedded{srv: srv}, nil
}

// portFree checks that host:port can be listened on; port 0 and -1 (off,
// or any free port) are not checked. key is the setting to change.
func portFree(what, key, host string, port int) error {
	if port <= 0 {
		return nil
	}
	addr := net.JoinHostPort(host, strconv.Itoa(port))
	l, err := net.Listen("tcp", addr)
	if errors.Is(err, syscall.EADDRINUSE) {
		return fmt.Errorf("embedded bus: %s port %s is in use by another process (another stillwater or NATS server?); stop it or choose another port in %s", what, addr, key)
	}
	if err != nil {
		return fmt.Errorf("embedded bus: cannot listen on %s (%s port, %s): %w", addr, what, key, err)
	}
	return l.Close()
}

func startServer(opts *server.Options) (*server.Server, error) {
	srv, err := server.NewServer(opts)
	if err != nil {
		return nil, err
	}
	srv.Start()
	if !srv.ReadyForConnections(10 * time.Second) {
		srv.Shutdown()
		return nil, errors.New("not ready within 10 s")
	}
	return srv, nil
}

// embeddedOptions turns cfg into nats-server options.
func embeddedOptions(cfg EmbeddedConfig) (*server.Options, error) {
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
	if len(cfg.Users) > 0 {
		if err := alert.ValidToken(cfg.Prefix); err != nil {
			return nil, fmt.Errorf("embedded bus users: prefix: %v", err)
		}
		stream := cfg.Stream
		if stream == "" {
			stream = DefaultStreamName
		}
		if err := alert.ValidToken(stream); err != nil {
			return nil, fmt.Errorf("embedded bus users: stream name: %v", err)
		}
		seen := map[string]bool{}
		for i, u := range cfg.Users {
			if u.Name == "" || u.Password == "" {
				return nil, fmt.Errorf("embedded bus users[%d]: name and password are both required", i)
			}
			if seen[u.Name] {
				return nil, fmt.Errorf("embedded bus users[%d]: name %q used twice", i, u.Name)
			}
			seen[u.Name] = true
			if u.Role != RoleDaemon {
				if err := ValidUserName(u.Name); err != nil {
					return nil, fmt.Errorf("embedded bus users[%d]: name: %w", i, err)
				}
			}
			perms, err := rolePermissions(cfg.Prefix, stream, u.Name, u.Role)
			if err != nil {
				return nil, fmt.Errorf("embedded bus users[%d] (%s): %w", i, u.Name, err)
			}
			opts.Users = append(opts.Users, &server.User{Username: u.Name, Password: u.Password, Permissions: perms})
		}
	}
	for i, l := range cfg.Leaf {
		r, err := leafRemote(l)
		if err != nil {
			return nil, fmt.Errorf("embedded bus leaf[%d]: %w", i, err)
		}
		opts.LeafNode.Remotes = append(opts.LeafNode.Remotes, r)
	}
	opts.JetStreamDomain = cfg.Domain
	if len(cfg.Leaf) > 0 && opts.JetStreamDomain == "" {
		opts.JetStreamDomain = "stillwater"
	}
	return opts, nil
}

// rolePermissions returns the NATS permissions of user in role, the
// ones the embedded server gives; an external server should give the
// same. Everyone may subscribe to _INBOX.> because request replies,
// JetStream acks and pulled messages arrive there. Control requests are
// hidden from responders and operators, since they may carry the control
// token, and no one but user may publish on user's control subjects, so
// that a request there names its sender.
//
// A responder or operator reaches JetStream only through the durable
// consumer named after it on stream: look it up (CONSUMER.INFO), pull
// (CONSUMER.MSG.NEXT) and acknowledge ($JS.ACK, in both of the server's
// reply formats). It may not create or change a consumer: the request
// body, which permissions cannot see, could name a deliver subject, and
// the server would then publish stored messages there in its own name.
func rolePermissions(prefix, stream, user, role string) (*server.Permissions, error) {
	ctl := alert.ControlSubject(prefix, ">")
	inbox := "_INBOX.>"
	switch role {
	case RoleDaemon:
		return &server.Permissions{
			Publish:   &server.SubjectPermission{Allow: []string{prefix + ".>", "$JS.API.>", inbox}, Deny: []string{ctl}},
			Subscribe: &server.SubjectPermission{Allow: []string{ctl, inbox}},
		}, nil
	case RoleResponder, RoleOperator:
		actions := []string{alert.ActionStatus}
		if role == RoleOperator {
			actions = append(actions, alert.ActionArm, alert.ActionDisarm, alert.ActionClear)
		}
		var pub []string
		for _, a := range actions {
			pub = append(pub, alert.ControlSubject(prefix, a), alert.UserControlSubject(prefix, user, a))
		}
		pub = append(pub, consumerSubjects(stream, user)...)
		return &server.Permissions{
			Publish:   &server.SubjectPermission{Allow: pub},
			Subscribe: &server.SubjectPermission{Allow: []string{prefix + ".>", inbox}, Deny: []string{ctl}},
		}, nil
	}
	return nil, fmt.Errorf("role %q: want %s, %s or %s", role, RoleDaemon, RoleResponder, RoleOperator)
}

// consumerSubjects are the JetStream subjects that bind, pull from and
// acknowledge the durable consumer of stream named user (nats-server's
// $JS.API.CONSUMER.INFO, $JS.API.CONSUMER.MSG.NEXT, and the ack reply
// subjects $JS.ACK.STREAM.CONSUMER.… and $JS.ACK.DOMAIN.ACCOUNT.STREAM.CONSUMER.…).
func consumerSubjects(stream, user string) []string {
	return []string{
		"$JS.API.CONSUMER.INFO." + stream + "." + user,
		"$JS.API.CONSUMER.MSG.NEXT." + stream + "." + user,
		"$JS.ACK." + stream + "." + user + ".>",
		"$JS.ACK.*.*." + stream + "." + user + ".>",
	}
}

func leafRemote(l LeafRemote) (*server.RemoteLeafOpts, error) {
	if len(l.URLs) == 0 {
		return nil, errors.New("no urls; give the central cluster's leaf-node URLs, e.g. nats-leaf://hub.example:7422")
	}
	r := &server.RemoteLeafOpts{Credentials: l.CredsFile}
	for _, s := range l.URLs {
		u, err := url.Parse(s)
		if err != nil || u.Host == "" {
			return nil, fmt.Errorf("url %q: not a URL like nats-leaf://host:7422", redactURL(s))
		}
		r.URLs = append(r.URLs, u)
		if u.Scheme == "tls" {
			r.TLS = true
		}
	}
	if l.CredsFile != "" {
		if err := readable(l.CredsFile); err != nil {
			return nil, fmt.Errorf("creds file: %w", err)
		}
	}
	tc, err := clientTLS(Auth{CAFile: l.CAFile, CertFile: l.CertFile, KeyFile: l.KeyFile})
	if err != nil {
		return nil, err
	}
	if tc != nil {
		r.TLS, r.TLSConfig = true, tc
	}
	return r, nil
}

// redactURL hides the password of a URL for messages and logs.
func redactURL(s string) string {
	u, err := url.Parse(s)
	if err != nil || u.User == nil {
		if i := strings.LastIndex(s, "@"); i >= 0 {
			return "…" + s[i:]
		}
		return s
	}
	return u.Redacted()
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
