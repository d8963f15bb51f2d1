package main

import (
	"context"
	"errors"
	"io"
)

// runReplay is being written; see the issue notes.
func runReplay(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	return errors.New("replay: not built yet")
}
