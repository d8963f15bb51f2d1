package main

import (
	"bytes"
	"context"
	"fmt"
	"io"
	"log/slog"
	"math"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"golang.org/x/sync/errgroup"

	"stillwater/vision"
	"stillwater/vision/synth"
)

// dev only: per-candidate dataset of tuning clips with the judge open.
func TestZZTracks(t *testing.T) {
	if os.Getenv("TRK") == "" {
		t.Skip()
	}
	dir := filepath.Join("..", "..", "testdata", "cache", "synth")
	files, _ := filepath.Glob(filepath.Join(dir, "*.json"))
	g, ctx := errgroup.WithContext(context.Background())
	g.SetLimit(envInt("PAR", 2))
	out := os.Getenv("TRK")
	os.MkdirAll(out, 0o755)
	for _, lf := range files {
		base := strings.TrimSuffix(filepath.Base(lf), ".json")
		if !strings.HasPrefix(base, "intruder-") && !strings.HasPrefix(base, "quiet-") {
			continue
		}
		g.Go(func() error {
			tr, err := synth.ReadTruth(lf)
			if err != nil {
				return err
			}
			if tr.Seed < 1 || tr.Seed > 99999 {
				return nil // tuning seeds only
			}
			video := strings.TrimSuffix(lf, ".json") + filepath.Ext(tr.Clip)
			cam, err := cameraFromLabels(tr, video)
			if err != nil {
				return err
			}
			applyEnv(&cam.Detect)
			cam.Detect.MinArea = 0.001
			cam.Detect.MaxLength, cam.Detect.MaxSpeed, cam.Detect.DeckRadius, cam.Detect.MinScore = 100, 100, -1, 0.001
			var buf bytes.Buffer
			fmt.Fprintln(&buf, "clip,frame,t,track,x,y,area,core,half,score,peak,contrast,bright,chroma,ctop,water,length,width,edge,present,dist,cx,cy,rejected,wet")
			rec := func(p *processor, r vision.Result) {
				var occ *synth.Occupation
				if r.Index < len(tr.PerFrame) {
					occ = tr.PerFrame[r.Index].Intruder
				}
				pres := 0
				for _, pr := range tr.Presence {
					if r.Media.Seconds() >= pr.From && r.Media.Seconds() < pr.To {
						pres = 1
					}
				}
				for _, n := range p.notes {
					dist, cx, cy := math.NaN(), math.NaN(), math.NaN()
					if occ != nil {
						dist = math.Hypot(n.At.X-occ.X, n.At.Y-occ.Y)
						cx, cy = occ.X, occ.Y
					}
					f := n.Features
					rej := strings.ReplaceAll(n.Rejected, ",", ";")
					fmt.Fprintf(&buf, "%s,%d,%.3f,%d,%.3f,%.3f,%.4f,%.4f,%.4f,%.1f,%.1f,%.3f,%.3f,%.2f,%.2f,%.2f,%.3f,%.3f,%.3f,%d,%.3f,%.3f,%.3f,%s,%.3f\n",
						base, r.Index, r.Media.Seconds(), n.Track, n.At.X, n.At.Y, f.Area, f.Core, f.Half, f.Score, f.Peak, f.Contrast, f.Bright, f.Chroma, f.ChromaTop, f.Water, f.Length, f.Width, f.Edge, pres, dist, cx, cy, rej, f.Wet)
				}
			}
			_, err = replayClip(ctx, cam, "x", io.Discard, slog.New(slog.NewTextHandler(io.Discard, nil)), func(p *processor) { p.explain = rec })
			if err != nil {
				return err
			}
			return os.WriteFile(filepath.Join(out, base+".csv"), buf.Bytes(), 0o644)
		})
	}
	if err := g.Wait(); err != nil {
		t.Fatal(err)
	}
}
