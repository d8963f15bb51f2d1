package main

import (
	"context"
	"flag"
	"fmt"
	"io"
	"log/slog"
	"os"
	"os/signal"
	"syscall"

	"stillwater/cmd/stillwater/internal/config"
	"stillwater/cmd/stillwater/internal/daemon"
	"stillwater/cmd/stillwater/internal/redact"
	"stillwater/vision"
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
	load := func() (config.Config, error) {
		cfg, err := config.LoadConfig(*path)
		if err != nil {
			return config.Config{}, fmt.Errorf("couldn't load configuration (-config %q): %w", *path, err)
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
			return config.Config{}, fmt.Errorf("configuration after flags: %w", err)
		}
		return cfg, nil
	}
	cfg, err := load()
	if err != nil {
		return err
	}
	// Every secret the configuration holds is hidden in every log line.
	log := redact.WithRedaction(newLogger(cfg.Log, stderr), cfg.Secrets()...)

	// SIGHUP reloads the file; a broken file is refused and logged, and
	// the daemon goes on with what it has.
	hup := make(chan os.Signal, 1)
	signal.Notify(hup, syscall.SIGHUP)
	defer signal.Stop(hup)
	// A calibration saved from the page reloads as SIGHUP does; a reload
	// already pending reads the new file too.
	reread := func() {
		select {
		case hup <- syscall.SIGHUP:
		default:
		}
	}
	reload := make(chan config.Config, 1)
	go func() {
		for {
			select {
			case <-ctx.Done():
				return
			case <-hup:
			}
			next, err := load()
			if err != nil {
				log.Error("reload refused; keeping the running configuration", "err", err)
				continue
			}
			redact.WithRedaction(log, next.Secrets()...)
			select {
			case reload <- next:
			case <-ctx.Done():
				return
			}
		}
	}()
	// FFmpeg's own messages join the daemon's log rather than stderr.
	if stopLibLog, err := vision.ForwardLibraryLog(log); err != nil {
		log.Warn("the video backend's own messages go to stderr", "err", err)
	} else {
		defer stopLibLog()
	}
	// The error is printed by main, outside the log: hide secrets there too.
	return redact.Of(log).Err(daemon.Serve(ctx, cfg, daemon.Deps{Log: log, Reload: reload, ConfigFile: *path, LoadConfig: load, Reread: reread}))
}

func newLogger(c config.LogConfig, w io.Writer) *slog.Logger {
	var lv slog.Level
	_ = lv.UnmarshalText([]byte(c.Level))
	o := &slog.HandlerOptions{Level: lv}
	if c.Format == "json" {
		return slog.New(slog.NewJSONHandler(w, o))
	}
	return slog.New(slog.NewTextHandler(w, o))
}
