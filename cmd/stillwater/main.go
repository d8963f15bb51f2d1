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
	"strings"
	"syscall"

	"stillwater/vision"
)

func main() {
	// Before any camera or clip opens (see vision.LimitCHeaps): with
	// glibc's default of eight arenas per CPU, eight cameras' resident
	// size crept up while the memory they used did not.
	if err := vision.LimitCHeaps(cHeapArenas); err != nil {
		fmt.Fprintln(os.Stderr, "stillwater: warning:", err)
	}
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	err := run(ctx, os.Args[1:], os.Stdout, os.Stderr)
	stop()
	os.Exit(exitCode(err, os.Stderr))
}

// exitCode prints err, if any, and returns the process's exit status: 0
// without an error, 2 for a usage error, 1 for any other.
func exitCode(err error, stderr io.Writer) int {
	if err == nil {
		return 0
	}
	fmt.Fprintln(stderr, "stillwater:", err)
	if errors.Is(err, errUsage) {
		return 2
	}
	return 1
}

var errUsage = errors.New("usage")

// cHeapArenas caps the C allocator's arenas for the whole process.
const cHeapArenas = 2

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
	err := runCommand(ctx, cmd, rest, stdout, stderr)
	// A command's flag set prints its flags on -h and then fails to
	// parse; the commands return the bare errUsage for any parse failure.
	if err == errUsage && helpAsked(rest) {
		return nil
	}
	return err
}

// helpAsked reports whether args ask for help the way the flag package
// reads them: -h, -help, --h or --help among the leading flags, up to "--"
// or an argument that is neither a flag nor a flag's value. Which flags
// take a value is the command's business, so a word after a flag counts
// as its value; run asks only when the command's flags did not parse.
func helpAsked(args []string) bool {
	value := false
	for _, a := range args {
		if a == "--" {
			return false
		}
		if len(a) < 2 || a[0] != '-' {
			if !value {
				return false
			}
			value = false
			continue
		}
		name := strings.TrimPrefix(strings.TrimPrefix(a, "-"), "-")
		name, _, hasValue := strings.Cut(name, "=")
		if name == "h" || name == "help" {
			return true
		}
		value = !hasValue
	}
	return false
}

// runCommand runs one subcommand.
func runCommand(ctx context.Context, cmd string, rest []string, stdout, stderr io.Writer) error {
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
