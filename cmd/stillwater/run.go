package main

import (
	"context"
	"flag"
	"fmt"
	"io"
	"log/slog"
)

// runDaemon is "stillwater run": the daemon from a config file.
func runDaemon(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := flag.NewFlagSet("run", flag.ContinueOnError)
	fs.SetOutput(stderr)
	path := fs.String("config", "/etc/stillwater/stillwater.yaml", "config `file`")
	httpAddr := fs.String("http", "", "metrics and health listener `host:port` (overrides http.listen)")
	dataDir := fs.String("data-dir", "", "data `directory` (overrides data_dir)")
	level := fs.String("log-level", "", "log `level`: debug, info, warn, error (overrides log.level)")
	if err := fs.Parse(args); err != nil {
		return errUsage
	}
	cfg, err := LoadConfig(*path)
	if err != nil {
		return fmt.Errorf("couldn't load configuration (--config=%q): %w", *path, err)
	}
	if *httpAddr != "" {
		cfg.HTTP.Listen = *httpAddr
	}
	if *dataDir != "" {
		cfg.DataDir = *dataDir
	}
	if *level != "" {
		cfg.Log.Level = *level
	}
	if err := cfg.Validate(); err != nil {
		return fmt.Errorf("configuration after flags: %w", err)
	}
	return serve(ctx, cfg, deps{Log: newLogger(cfg.Log, stderr)})
}

func newLogger(c LogConfig, w io.Writer) *slog.Logger {
	var lv slog.Level
	_ = lv.UnmarshalText([]byte(c.Level))
	o := &slog.HandlerOptions{Level: lv}
	if c.Format == "json" {
		return slog.New(slog.NewJSONHandler(w, o))
	}
	return slog.New(slog.NewTextHandler(w, o))
}
