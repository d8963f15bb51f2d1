//go:build matprofile

package vision

import (
	"bytes"
	"fmt"
	"os"
	"testing"

	"gocv.io/x/gocv"
)

// TestMain fails the package when any test leaves a Mat open. It needs
// -tags matprofile, which the README's test command sets.
func TestMain(m *testing.M) {
	code := m.Run()
	if n := gocv.MatProfile.Count(); n != 0 {
		var b bytes.Buffer
		gocv.MatProfile.WriteTo(&b, 1)
		fmt.Fprintf(os.Stderr, "%d Mats left open:\n%s", n, b.String())
		code = 1
	}
	os.Exit(code)
}
