// Package testkit holds the test fixtures several packages of the
// stillwater command share: an in-process bus, metric look-ups, and clicks
// on synthetic scenes.
package testkit

import (
	"context"
	"log/slog"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	dto "github.com/prometheus/client_model/go"
	"github.com/stretchr/testify/require"

	"stillwater/alert/arming"
	"stillwater/cmd/stillwater/internal/config"
)

// BusConfig is a daemon configuration for the bus side alone: the
// embedded server on a free port, data in a fresh directory.
func BusConfig(t testing.TB) config.Config {
	t.Helper()
	cfg := config.Defaults()
	cfg.DataDir = t.TempDir()
	cfg.Bus = config.BusConfig{Listen: "127.0.0.1:-1", Prefix: "sw"}
	return cfg
}

// OpenBus opens the daemon's bus side for cfg, with one camera, north.
func OpenBus(t testing.TB, cfg config.Config, log *slog.Logger, h config.BusHooks) *config.BusParts {
	t.Helper()
	b, err := config.OpenBus(context.Background(), cfg, arming.Config{Cameras: []string{"north"}}, time.Now, log, h)
	require.NoError(t, err)
	return b
}

// RunBus runs b until the test ends, then closes it.
func RunBus(t testing.TB, b *config.BusParts) {
	t.Helper()
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- b.Run(ctx) }()
	t.Cleanup(func() { cancel(); <-done; b.Close() })
}

// MetricValue returns the value of the series name{labels} on reg: a
// counter's or gauge's value, a histogram's sample count.
func MetricValue(t *testing.T, reg *prometheus.Registry, name string, labels map[string]string) (float64, bool) {
	t.Helper()
	mfs, err := reg.Gather()
	require.NoError(t, err)
	for _, mf := range mfs {
		if mf.GetName() != name {
			continue
		}
	next:
		for _, m := range mf.GetMetric() {
			have := map[string]string{}
			for _, lp := range m.GetLabel() {
				have[lp.GetName()] = lp.GetValue()
			}
			for k, v := range labels {
				if have[k] != v {
					continue next
				}
			}
			return sampleValue(m), true
		}
	}
	return 0, false
}

func sampleValue(m *dto.Metric) float64 {
	switch {
	case m.Counter != nil:
		return m.GetCounter().GetValue()
	case m.Gauge != nil:
		return m.GetGauge().GetValue()
	case m.Histogram != nil:
		return float64(m.GetHistogram().GetSampleCount())
	}
	return 0
}
