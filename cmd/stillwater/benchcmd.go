package main

import (
	"context"
	"encoding/json"
	"flag"
	"fmt"
	"io"
	"log/slog"
	"time"

	"stillwater/cmd/stillwater/internal/bench"
	"stillwater/cmd/stillwater/internal/config"
)

// runBench is "stillwater bench": N cameras played in real time through
// the whole daemon (serve, its embedded bus, a subscriber timing what
// arrives), and, in the same run, the same clip decoded alone and run
// through a plain OpenCV motion loop, so that what the daemon costs is a
// ratio to what decoding costs.
func runBench(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := flag.NewFlagSet("bench", flag.ContinueOnError)
	fs.SetOutput(stderr)
	var o bench.Options
	var size, evSize string
	fs.IntVar(&o.Cameras, "cameras", 1, "`number` of cameras, each playing the clip")
	fs.StringVar(&size, "size", "640x360", "frame `size` of the generated clip: WxH, or 360p, 720p, 1080p")
	fs.Float64Var(&o.Fps, "fps", 15, "frame `rate` of the generated clips")
	fs.StringVar(&o.Codec, "codec", "h264", "`codec` of the generated clip: h264, mpeg4 or mjpeg")
	fs.DurationVar(&o.Duration, "duration", 60*time.Second, "how long the cameras run")
	fs.DurationVar(&o.Warmup, "warmup", 10*time.Second, "first part of the run left out of the figures (opening, background learning)")
	fs.StringVar(&o.Clip, "clip", "", "a video `file` to play instead of a generated clip (watched as if an 8 × 4 m pool filled its middle)")
	fs.StringVar(&evSize, "evidence-size", "", "also give each camera an evidence stream of this `size` (WxH or 1080p), copied without decoding")
	fs.StringVar(&o.EvClip, "evidence-clip", "", "the evidence stream's video `file` instead of a generated one")
	fs.Int64Var(&o.Seed, "seed", 34, "`seed` of the generated family scene (34: daylight, a child in the water from about 6 s)")
	fs.Float64Var(&o.ClipSeconds, "clip-seconds", 40, "`length` of the generated clip, played in a loop")
	fs.IntVar(&o.Repeat, "repeat", 3, "`runs` of each yardstick loop; the median is reported")
	fs.IntVar(&o.OpenCVThreads, "opencv-threads", config.DefaultOpenCVThreads, "OpenCV's worker pool `size` for the run, as the config's opencv_threads (0: one per CPU)")
	fs.BoolVar(&o.Loops, "loops", true, "run the yardsticks (decode alone, ffmpeg decode, plain OpenCV loop) after the cameras")
	fs.BoolVar(&o.Deblock, "deblock", false, "cameras decode with the codec's deblocking filter, as the camera setting deblock: true")
	fs.BoolVar(&o.Paced, "paced", false, "with -loops, also decode the clip alone at its frame rate, as the cameras read it (adds the clip's length to the run)")
	fs.StringVar(&o.DataDir, "data-dir", "", "data `directory` of the daemon (default: a temporary one, removed after)")
	fs.StringVar(&o.Cache, "cache", "", "render cache `directory` (default: testdata/cache/synth in the checkout, else the user cache)")
	verbose := fs.Bool("v", false, "log the daemon to stderr")
	if err := fs.Parse(args); err != nil {
		return errUsage
	}
	var err error
	if o.Size, err = bench.ParseSize(size); err != nil {
		return fmt.Errorf("bench -size: %v: %w", err, errUsage)
	}
	if evSize != "" {
		if o.EvSize, err = bench.ParseSize(evSize); err != nil {
			return fmt.Errorf("bench -evidence-size: %v: %w", err, errUsage)
		}
	}
	if err := o.Validate(); err != nil {
		return fmt.Errorf("bench: %v: %w", err, errUsage)
	}
	log := slog.New(slog.NewTextHandler(io.Discard, nil))
	if *verbose {
		log = slog.New(slog.NewTextHandler(stderr, nil))
	}
	res, err := bench.Run(ctx, o, log, stderr)
	if err != nil {
		return err
	}
	res.Print(stdout)
	b, err := json.Marshal(res)
	if err != nil {
		return err
	}
	_, err = fmt.Fprintf(stdout, "%s\n", b)
	return err
}
