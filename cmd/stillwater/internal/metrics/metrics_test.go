package metrics

import (
	"errors"
	"flag"
	"io"
	"log/slog"
	"os"
	"path/filepath"
	"regexp"
	"runtime"
	"strings"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/testutil"
	dto "github.com/prometheus/client_model/go"
	"github.com/prometheus/common/expfmt"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"stillwater/alert"
	"stillwater/alert/bus"
	"stillwater/cmd/stillwater/internal/config"
	"stillwater/cmd/stillwater/internal/testkit"
)

var update = flag.Bool("update", false, "rewrite golden files")

// TestMetricsExposition drives every collector of the daemon's own
// metrics (New, and the bus side's RegisterBusMetrics over an
// in-process server) through a fixed sequence and compares the text
// exposition, names, help, types, labels, buckets and values, with
// testdata/metrics.golden. Rewrite it with go test -run
// TestMetricsExposition -update after a deliberate change, and read the
// diff: a renamed series breaks dashboards and the alert rules in
// deploy/prometheus. The Go version label of stillwater_build_info reads
// GOVERSION in the file.
func TestMetricsExposition(t *testing.T) {
	reg := prometheus.NewRegistry()
	m := New(reg, "v1.2.3")
	for _, id := range []string{"north", "south"} {
		c := m.Camera(id)
		c.CameraUp(true)
		c.ArmedState(id == "north")
		c.Heartbeat(time.Date(2026, 7, 1, 12, 0, 0, 0, time.UTC))
		c.Published(alert.KindBeat)
	}
	c := m.Camera("north")
	for i := 0; i < 3; i++ {
		c.Frame()
		c.Stage("vision", 3*time.Millisecond)
		c.Stage("track", 300*time.Microsecond)
		c.Processed(4 * time.Millisecond)
	}
	c.Frame()
	c.DecodeErrors(1)
	c.DroppedFrames(2)
	c.DroppedFrames(0) // nothing to count: no series change
	c.Rejected("small")
	c.Rejected("small")
	c.Rejected("zone")
	c.Tracks(1)
	c.Alarm()
	c.Fault(alert.FaultCameraFrozen, true)
	c.Fault(alert.FaultCameraFrozen, false)
	c.Fault(alert.FaultCalibrationDrift, true)
	c.Reconnect()
	c.PublishError()
	m.Camera("south").Stage("publish", 15*time.Millisecond)
	m.BusResult(bus.PublishResult{Camera: "north", Kind: alert.KindTarget, ID: "a", Latency: 8 * time.Millisecond})
	m.BusResult(bus.PublishResult{Camera: "north", Kind: alert.KindTarget, ID: "b", Latency: 1500 * time.Millisecond, Outboxed: true})
	m.BusResult(bus.PublishResult{Camera: "north", Kind: alert.KindCleared, ID: "c", Err: errors.New("dead-lettered")})
	m.Refused.WithLabelValues("http").Inc()

	log := slog.New(slog.NewTextHandler(io.Discard, nil))
	b := testkit.OpenBus(t, testkit.BusConfig(t), log, config.BusHooks{})
	t.Cleanup(func() { b.Close() })
	RegisterBusMetrics(reg, b, func() time.Time { return time.Date(2026, 7, 1, 12, 0, 0, 0, time.UTC) })

	// The build's Go version changes with the toolchain; the file keeps a
	// placeholder.
	g := prometheus.GathererFunc(func() ([]*dto.MetricFamily, error) {
		mfs, err := reg.Gather()
		for _, mf := range mfs {
			for _, s := range mf.GetMetric() {
				for _, l := range s.GetLabel() {
					if l.GetName() == "goversion" && l.GetValue() == runtime.Version() {
						l.Value = new(string)
						*l.Value = "GOVERSION"
					}
				}
			}
		}
		return mfs, err
	})
	golden := filepath.Join("testdata", "metrics.golden")
	if *update {
		mfs, err := g.Gather()
		require.NoError(t, err)
		f, err := os.Create(golden)
		require.NoError(t, err)
		for _, mf := range mfs {
			_, err := expfmt.MetricFamilyToText(f, mf)
			require.NoError(t, err)
		}
		require.NoError(t, f.Close())
	}
	f, err := os.Open(golden)
	require.NoError(t, err, "missing golden file; run with -update")
	defer f.Close()
	require.NoError(t, testutil.GatherAndCompare(g, f))
}

// TestAlertRulesUseExportedSeries: every stillwater_ series that the
// Prometheus alert rules in deploy/prometheus read is one the daemon
// exports (testdata/metrics.golden, checked above against New). A
// rule over a renamed series would never fire.
func TestAlertRulesUseExportedSeries(t *testing.T) {
	golden, err := os.ReadFile(filepath.Join("testdata", "metrics.golden"))
	require.NoError(t, err)
	exported := map[string]bool{}
	for _, m := range regexp.MustCompile(`(?m)^# TYPE (stillwater_\w+) `).FindAllStringSubmatch(string(golden), -1) {
		exported[m[1]] = true
	}
	require.NotEmpty(t, exported)
	rules, err := os.ReadFile(filepath.Join("..", "..", "..", "..", "deploy", "prometheus", "alerts.yml"))
	require.NoError(t, err)
	used := regexp.MustCompile(`stillwater_\w+`).FindAllString(string(rules), -1)
	require.NotEmpty(t, used, "no stillwater_ series in the alert rules")
	for _, name := range used {
		base := name
		for _, suffix := range []string{"_bucket", "_sum", "_count"} {
			if b, ok := strings.CutSuffix(name, suffix); ok && exported[b] {
				base = b
			}
		}
		assert.True(t, exported[base], "alerts.yml reads %s, which the daemon does not export", name)
	}
}
