package bus

import (
	"crypto/tls"
	"crypto/x509"
	"errors"
	"fmt"
	"os"
	"strings"

	"github.com/nats-io/nats.go"
)

// Secret is a password or token given one of three ways. Env and File are
// preferred; Value (inline in the config file) works but ends up in
// backups and diffs, so Resolve reports it as a warning.
type Secret struct {
	Value string // inline
	Env   string // name of an environment variable holding it
	File  string // path of a file holding it; surrounding white space is trimmed
}

// IsSet reports whether any source is given.
func (s Secret) IsSet() bool { return s.Value != "" || s.Env != "" || s.File != "" }

// Resolve returns the secret. getenv looks up environment variables (pass
// os.Getenv). inline is true when the secret came from Value. More than
// one source, an unset variable, an unreadable or empty file are errors
// naming where the secret was looked for (never the secret).
func (s Secret) Resolve(getenv func(string) string) (secret string, inline bool, err error) {
	n := 0
	for _, v := range []string{s.Value, s.Env, s.File} {
		if v != "" {
			n++
		}
	}
	switch {
	case n == 0:
		return "", false, nil
	case n > 1:
		return "", false, errors.New("give the secret one way only: inline, from an environment variable or from a file")
	case s.Value != "":
		return s.Value, true, nil
	case s.Env != "":
		v := getenv(s.Env)
		if v == "" {
			return "", false, fmt.Errorf("environment variable %s is empty or unset", s.Env)
		}
		return v, false, nil
	}
	b, err := os.ReadFile(s.File)
	if err != nil {
		return "", false, fmt.Errorf("read secret file: %w", err)
	}
	v := strings.TrimSpace(string(b))
	if v == "" {
		return "", false, fmt.Errorf("secret file %s is empty", s.File)
	}
	return v, false, nil
}

// Auth is how a client proves who it is to a NATS server and checks the
// server: at most one of user/password, token, NKey seed file and
// credentials (JWT) file, plus optional TLS. Secrets are resolved by the
// caller (see Secret) before they get here.
type Auth struct {
	User     string
	Password string
	Token    string
	// NKeySeedFile holds an NKey user seed (SU...).
	NKeySeedFile string
	// CredsFile is a decorated JWT + seed file as made by nsc.
	CredsFile string
	// CAFile verifies the server's certificate; empty uses the system roots
	// when the URL is tls://.
	CAFile string
	// CertFile and KeyFile are a client certificate for mutual TLS; both or
	// neither.
	CertFile, KeyFile string
}

// ConnectOptions turns auth into nats.Options. Every file is read now so
// that a missing or unreadable one fails at start-up with its name rather
// than at the first reconnect.
func ConnectOptions(a Auth) ([]nats.Option, error) {
	var opts []nats.Option
	kinds := 0
	if a.User != "" || a.Password != "" {
		if a.User == "" || a.Password == "" {
			return nil, errors.New("bus auth: user and password go together; set both or neither")
		}
		kinds++
		opts = append(opts, nats.UserInfo(a.User, a.Password))
	}
	if a.Token != "" {
		kinds++
		opts = append(opts, nats.Token(a.Token))
	}
	if a.NKeySeedFile != "" {
		kinds++
		if err := readable(a.NKeySeedFile); err != nil {
			return nil, fmt.Errorf("bus auth: nkey seed file: %w", err)
		}
		o, err := nats.NkeyOptionFromSeed(a.NKeySeedFile)
		if err != nil {
			return nil, fmt.Errorf("bus auth: nkey seed file %s: %w", a.NKeySeedFile, err)
		}
		opts = append(opts, o)
	}
	if a.CredsFile != "" {
		kinds++
		if err := readable(a.CredsFile); err != nil {
			return nil, fmt.Errorf("bus auth: creds file: %w", err)
		}
		opts = append(opts, nats.UserCredentials(a.CredsFile))
	}
	if kinds > 1 {
		return nil, errors.New("bus auth: use one of user/password, token, nkey seed file or creds file, not several")
	}
	tc, err := clientTLS(a)
	if err != nil {
		return nil, err
	}
	if tc != nil {
		opts = append(opts, nats.Secure(tc))
	}
	return opts, nil
}

func clientTLS(a Auth) (*tls.Config, error) {
	if a.CAFile == "" && a.CertFile == "" && a.KeyFile == "" {
		return nil, nil
	}
	tc := &tls.Config{MinVersion: tls.VersionTLS12}
	if a.CAFile != "" {
		pem, err := os.ReadFile(a.CAFile)
		if err != nil {
			return nil, fmt.Errorf("bus tls: ca file: %w", err)
		}
		pool := x509.NewCertPool()
		if !pool.AppendCertsFromPEM(pem) {
			return nil, fmt.Errorf("bus tls: ca file %s: no PEM certificate in it", a.CAFile)
		}
		tc.RootCAs = pool
	}
	if (a.CertFile == "") != (a.KeyFile == "") {
		return nil, errors.New("bus tls: cert file and key file go together; set both or neither")
	}
	if a.CertFile != "" {
		c, err := tls.LoadX509KeyPair(a.CertFile, a.KeyFile)
		if err != nil {
			return nil, fmt.Errorf("bus tls: client cert %s / key %s: %w", a.CertFile, a.KeyFile, err)
		}
		tc.Certificates = []tls.Certificate{c}
	}
	return tc, nil
}

func readable(path string) error {
	f, err := os.Open(path)
	if err != nil {
		return err
	}
	return f.Close()
}
