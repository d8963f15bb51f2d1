// Package redact hides secrets (passwords, tokens, their URL- and
// JSON-escaped forms) in log lines, errors and bus URLs.
package redact

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"log/slog"
	"net/url"
	"sort"
	"strings"
	"sync"
)

// redactMark replaces a secret, as vision.Redact does for a URL's
// password.
const redactMark = "xxxxx"

// Redactor replaces secret values wherever they occur in text: every
// value that came from ${NAME}, a *_env or a *_file setting, or an inline
// secret. Each is also matched as it appears URL-escaped and inside a JSON
// string. Safe for concurrent use; values are only ever added, so that a
// secret rotated away stays hidden in later lines too.
type Redactor struct {
	mu    sync.RWMutex
	forms map[string]bool
	rep   *strings.Replacer // nil while there is nothing to hide
}

// New returns a redactor that hides the given secrets.
func New(secrets ...string) *Redactor {
	r := &Redactor{forms: map[string]bool{}}
	r.add(secrets...)
	return r
}

// add hides more values; empty ones are ignored.
func (r *Redactor) add(secrets ...string) {
	r.mu.Lock()
	defer r.mu.Unlock()
	n := len(r.forms)
	for _, s := range secrets {
		if s == "" {
			continue
		}
		js, _ := json.Marshal(s)
		for _, f := range []string{s, url.QueryEscape(s), url.PathEscape(s), string(js[1 : len(js)-1])} {
			r.forms[f] = true
		}
	}
	if len(r.forms) == n {
		return
	}
	// Longest first: a secret that contains another is replaced whole.
	all := make([]string, 0, len(r.forms))
	for f := range r.forms {
		all = append(all, f)
	}
	sort.Slice(all, func(i, j int) bool {
		if len(all[i]) != len(all[j]) {
			return len(all[i]) > len(all[j])
		}
		return all[i] < all[j]
	})
	pairs := make([]string, 0, 2*len(all))
	for _, f := range all {
		pairs = append(pairs, f, redactMark)
	}
	r.rep = strings.NewReplacer(pairs...)
}

// String returns s with every secret replaced.
func (r *Redactor) String(s string) string {
	if r == nil {
		return s
	}
	r.mu.RLock()
	rep := r.rep
	r.mu.RUnlock()
	if rep == nil {
		return s
	}
	return rep.Replace(s)
}

// Bytes is String for a byte slice; b itself is returned when nothing
// was hidden.
func (r *Redactor) Bytes(b []byte) []byte {
	s := string(b)
	if out := r.String(s); out != s {
		return []byte(out)
	}
	return b
}

// Err returns err with its message redacted; err itself when nothing was
// hidden, so that errors.Is keeps working in the common case.
func (r *Redactor) Err(err error) error {
	if err == nil {
		return nil
	}
	s := err.Error()
	if out := r.String(s); out != s {
		return errors.New(out)
	}
	return err
}

// redactHandler is a slog.Handler that hides secrets in the message and
// in every attribute (strings, errors, Stringers and anything else that
// prints a secret) before the next handler formats the record.
type redactHandler struct {
	next slog.Handler
	red  *Redactor
}

// WithRedaction returns log with secrets hidden. A logger already made
// by withRedaction only learns the new secrets, so that the daemon keeps
// one redactor however often it is called.
func WithRedaction(log *slog.Logger, secrets ...string) *slog.Logger {
	if h, ok := log.Handler().(*redactHandler); ok {
		h.red.add(secrets...)
		return log
	}
	return slog.New(&redactHandler{next: log.Handler(), red: New(secrets...)})
}

// Of returns log's redactor, or nil when it has none.
func Of(log *slog.Logger) *Redactor {
	if h, ok := log.Handler().(*redactHandler); ok {
		return h.red
	}
	return nil
}

func (h *redactHandler) Enabled(ctx context.Context, l slog.Level) bool {
	return h.next.Enabled(ctx, l)
}

func (h *redactHandler) Handle(ctx context.Context, r slog.Record) error {
	nr := slog.NewRecord(r.Time, r.Level, h.red.String(r.Message), r.PC)
	r.Attrs(func(a slog.Attr) bool {
		nr.AddAttrs(h.attr(a))
		return true
	})
	return h.next.Handle(ctx, nr)
}

func (h *redactHandler) WithAttrs(as []slog.Attr) slog.Handler {
	out := make([]slog.Attr, len(as))
	for i, a := range as {
		out[i] = h.attr(a)
	}
	return &redactHandler{next: h.next.WithAttrs(out), red: h.red}
}

func (h *redactHandler) WithGroup(name string) slog.Handler {
	return &redactHandler{next: h.next.WithGroup(name), red: h.red}
}

// attr hides secrets in one attribute; values without any are passed on
// unchanged, so that the next handler formats them as usual.
func (h *redactHandler) attr(a slog.Attr) slog.Attr {
	v := a.Value.Resolve()
	switch v.Kind() {
	case slog.KindString:
		return slog.String(a.Key, h.red.String(v.String()))
	case slog.KindGroup:
		g := v.Group()
		out := make([]slog.Attr, len(g))
		for i, ga := range g {
			out[i] = h.attr(ga)
		}
		return slog.Attr{Key: a.Key, Value: slog.GroupValue(out...)}
	case slog.KindAny:
		var s string
		switch x := v.Any().(type) {
		case nil:
			return slog.Attr{Key: a.Key, Value: v}
		case error:
			s = x.Error()
		case fmt.Stringer:
			s = x.String()
		default:
			s = fmt.Sprintf("%+v", x)
		}
		if out := h.red.String(s); out != s {
			return slog.String(a.Key, out)
		}
	}
	return slog.Attr{Key: a.Key, Value: v}
}
