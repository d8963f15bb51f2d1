package main

import (
	"context"
	"errors"
	"io"
)

// runListen is being written; see the issue notes.
func runListen(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	return errors.New("listen: not built yet")
}
