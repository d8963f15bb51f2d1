package main

import (
	"context"
	"errors"
	"io"
)

// runSweep is being written; see the issue notes.
func runSweep(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	return errors.New("sweep: not built yet")
}
