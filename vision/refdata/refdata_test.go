package refdata

import (
	"strings"
	"testing"
)

func TestPathFindsSetupFiles(t *testing.T) {
	p, err := Path("H1to3p.xml")
	if err != nil {
		t.Fatal(err)
	}
	if !strings.HasSuffix(p, "examples/data/H1to3p.xml") {
		t.Fatalf("path %q", p)
	}
	if _, err := Path("no-such-file.bin"); err == nil || !strings.Contains(err.Error(), "deploy/setup") {
		t.Fatalf("missing file error %v; want one naming deploy/setup", err)
	}
}
