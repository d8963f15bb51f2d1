// Command stillwater watches a swimming pool through an overhead camera and
// publishes the position of anyone in the water while the pool is armed.
package main

import (
	"context"
	"errors"
	"fmt"
	"io"
	"os"
	"os/signal"
	"syscall"
)

func main() {
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	err := run(ctx, os.Args[1:], os.Stdout, os.Stderr)
	stop()
	if err != nil {
		fmt.Fprintln(os.Stderr, "stillwater:", err)
		if errors.Is(err, errUsage) {
			os.Exit(2)
		}
		os.Exit(1)
	}
}

var errUsage = errors.New("usage")

const usage = `usage: stillwater <command> [flags]

commands:
  run        watch the cameras of a config file (the daemon)
  check      validate a config file and print what the daemon would do
  listen     print live messages from the bus
  calibrate  solve a camera's pool calibration from a frame and its corners
  replay     run the detection pipeline over a recorded clip, messages as JSON lines
  score      compare replay output with a label file
  sweep      replay and score clips over a grid of detection settings
  demo       run the daemon on a generated clip with an in-process bus
  synth      render a synthetic pool clip and its label file
  bench      run cameras in real time through the daemon and measure its cost

run "stillwater <command> -h" for a command's flags`

func run(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	if len(args) == 0 {
		fmt.Fprintln(stderr, usage)
		return errUsage
	}
	cmd, rest := args[0], args[1:]
	switch cmd {
	case "run":
		return runDaemon(ctx, rest, stdout, stderr)
	case "demo":
		return runDemo(ctx, rest, stdout, stderr)
	case "synth":
		return runSynth(ctx, rest, stdout, stderr)
	case "check":
		return runCheck(ctx, rest, stdout, stderr)
	case "listen":
		return runListen(ctx, rest, stdout, stderr)
	case "calibrate":
		return runCalibrate(ctx, rest, stdout, stderr)
	case "replay":
		return runReplay(ctx, rest, stdout, stderr)
	case "score":
		return runScore(ctx, rest, stdout, stderr)
	case "sweep":
		return runSweep(ctx, rest, stdout, stderr)
	case "bench":
		return runBench(ctx, rest, stdout, stderr)
	case "-h", "-help", "--help", "help":
		fmt.Fprintln(stdout, usage)
		return nil
	}
	fmt.Fprintf(stderr, "unknown command %q\n%s\n", cmd, usage)
	return errUsage
}
