// Command stillwater score compares replay output with the clip's labels:
// detection, first-alert delay, false alarms, position error, track breaks
// and picture faults, per clip and in total.
package main

import (
	"context"
	"flag"
	"fmt"
	"io"
	"strings"

	"stillwater/cmd/stillwater/internal/tuning"
)

// runScore is "stillwater score replay.jsonl labels.json [replay labels ...]".
func runScore(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := flag.NewFlagSet("score", flag.ContinueOnError)
	fs.SetOutput(stderr)
	fs.Usage = func() {
		fmt.Fprintln(stderr, "usage: stillwater score [flags] replay.jsonl labels.json [replay.jsonl labels.json ...]")
		fs.PrintDefaults()
	}
	lim := tuning.ScoreLimits{}
	fs.DurationVar(&lim.MaxDelay, "max-delay", -1, "fail when the worst first-alert delay exceeds this `duration`")
	fs.IntVar(&lim.MaxFalse, "max-false", -1, "fail when there are more false alarms than this `count`")
	fs.Float64Var(&lim.MaxP95, "max-p95", -1, "fail when the 95th percentile position error exceeds this many `metres`")
	fs.IntVar(&lim.MaxBreaks, "max-breaks", -1, "fail when there are more track breaks than this `count`")
	fs.DurationVar(&lim.MaxFaultDelay, "max-fault-delay", -1, "fail when a labelled picture fault is not raised within this `duration` of its onset")
	fs.IntVar(&lim.MaxFalseFaults, "max-unlabelled-faults", -1, "fail when more picture faults than this `count` are raised with none labelled")
	fs.IntVar(&lim.MaxFaultTargets, "max-fault-targets", -1, "fail when more targets than this `count` start while a labelled fault is on")
	rules := tuning.DefaultScoreRules()
	fs.Float64Var(&rules.FarM, "far", rules.FarM, "`metres` from the intruder beyond which a new target is a false alarm")
	fs.DurationVar(&rules.Grace, "grace", rules.Grace, "how long after the intruder leaves a target still counts as theirs")
	if err := fs.Parse(args); err != nil {
		return errUsage
	}
	rest := fs.Args()
	if len(rest) == 0 || len(rest)%2 != 0 {
		fs.Usage()
		return fmt.Errorf("score: want pairs of replay output and label file, got %d arguments: %w", len(rest), errUsage)
	}
	var cs []tuning.ClipScore
	for i := 0; i < len(rest); i += 2 {
		c, err := tuning.ScoreFiles(rest[i], rest[i+1], rules)
		if err != nil {
			return err
		}
		cs = append(cs, c)
	}
	tuning.WriteScores(stdout, cs)
	if bad := lim.Check(tuning.TotalOf(cs)); len(bad) > 0 {
		return fmt.Errorf("score: %s", strings.Join(bad, "; "))
	}
	return nil
}
