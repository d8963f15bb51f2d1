package main

import (
	"bytes"
	"context"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
)

// TestExitCodes: asking a command for its flags (-h, -help, --help)
// prints them and exits 0, as Go's own flag package does for a program
// that exits on its errors; a flag or argument that is wrong exits 2 and
// a failure of the work itself 1.
func TestExitCodes(t *testing.T) {
	var commands []string
	for _, l := range strings.Split(usage, "\n") {
		if f := strings.Fields(l); len(f) > 1 && strings.HasPrefix(l, "  ") {
			commands = append(commands, f[0])
		}
	}
	assert.Len(t, commands, 10, "commands in the usage text")
	type tcase struct {
		name string
		args []string
		code int
		// say must appear on stdout or stderr.
		say string
	}
	cases := []tcase{
		{"no command", nil, 2, "commands:"},
		{"help", []string{"-h"}, 0, "commands:"},
		{"unknown command", []string{"frobnicate"}, 2, `unknown command "frobnicate"`},
		{"unknown flag", []string{"demo", "-bogus"}, 2, "-bogus"},
		{"help among other flags", []string{"demo", "-seed", "3", "-help"}, 0, "-scenario"},
		{"help as a flag's value", []string{"demo", "-scenario", "-h"}, 2, `"-h"`},
		{"unknown scenario", []string{"demo", "-scenario", "nosuch"}, 2, "nosuch"},
		{"missing config", []string{"check", "-config", "testdata/check/no-such-file.yaml"}, 1, "no-such-file.yaml"},
	}
	for _, c := range commands {
		for _, h := range []string{"-h", "-help", "--help"} {
			cases = append(cases, tcase{c + " " + h, []string{c, h}, 0, "-"})
		}
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			var out, errb bytes.Buffer
			err := run(context.Background(), tc.args, &out, &errb)
			code := exitCode(err, &errb)
			assert.Equal(t, tc.code, code, "exit code; stderr:\n%s", errb.String())
			assert.Contains(t, out.String()+errb.String(), tc.say)
			if tc.code == 0 && len(tc.args) > 1 {
				assert.Contains(t, strings.ToLower(errb.String()), "usage", "the command's flags were not printed")
				assert.NotContains(t, errb.String(), "stillwater: usage")
			}
		})
	}
}
