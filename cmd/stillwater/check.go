package main

import (
	"bytes"
	"context"
	"flag"
	"fmt"
	"io"
	"os"
	"strings"
	"time"

	"stillwater/cmd/stillwater/internal/check"
	"stillwater/cmd/stillwater/internal/config"
	"stillwater/cmd/stillwater/internal/redact"
)

// runCheck is "stillwater check": validate a config file and print what
// the daemon would do with it, without opening any camera or port.
func runCheck(_ context.Context, args []string, stdout, stderr io.Writer) error {
	fs := flag.NewFlagSet("check", flag.ContinueOnError)
	fs.SetOutput(stderr)
	path := fs.String("config", "/etc/stillwater/stillwater.yaml", "config `file` to check")
	at := fs.String("at", "", "evaluate the arming schedule at this RFC 3339 `time` instead of now")
	dataDir := fs.String("data-dir", "", "data `directory` (overrides data_dir, as run -data-dir does)")
	if err := fs.Parse(args); err != nil {
		return errUsage
	}
	now := time.Now()
	if *at != "" {
		t, err := time.Parse(time.RFC3339, *at)
		if err != nil {
			return fmt.Errorf("check -at %q: want an RFC 3339 time such as 2026-06-01T21:00:00+02:00", *at)
		}
		now = t
	}
	cfg, err := config.LoadConfig(*path)
	if err != nil {
		return fmt.Errorf("config is not valid: %w", err)
	}
	if *dataDir != "" {
		cfg.DataDir = *dataDir
	}
	red := redact.New(cfg.Secrets()...)
	if probs := check.HostProblems(cfg, os.Getenv); len(probs) > 0 {
		return fmt.Errorf("%s: valid, but run would fail or watch nothing:\n  %s", *path, red.String(strings.Join(probs, "\n  ")))
	}
	var out bytes.Buffer
	if err := check.Describe(&out, *path, cfg, now); err != nil {
		return red.Err(err)
	}
	_, err = io.WriteString(stdout, red.String(out.String()))
	return err
}
