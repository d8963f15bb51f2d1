// Package browsertest starts a headless Chromium for tests of the page
// and writes the screenshots the README shows. Only tests import it.
//
// A test skips when no browser is installed, with a message saying how to
// install one, unless STILLWATER_REQUIRE_BROWSER=1, where a missing
// browser fails it. STILLWATER_CHROMIUM names the browser's executable
// when it is not on PATH as chromium.
package browsertest

import (
	"bytes"
	"context"
	"fmt"
	"image"
	"image/color/palette"
	"image/draw"
	"image/png"
	"os"
	"os/exec"
	"path/filepath"
	"testing"
	"time"

	"github.com/chromedp/chromedp"
)

// MaxScreenBytes bounds a README screenshot.
const MaxScreenBytes = 150 << 10

// executable finds the browser: STILLWATER_CHROMIUM, or the names
// Debian and others install it under.
func executable() string {
	if p := os.Getenv("STILLWATER_CHROMIUM"); p != "" {
		if q, err := exec.LookPath(p); err == nil {
			return q
		}
		return ""
	}
	for _, name := range []string{"chromium", "chromium-browser", "google-chrome"} {
		if p, err := exec.LookPath(name); err == nil {
			return p
		}
	}
	return ""
}

// Start launches a headless browser with a window of width × height CSS
// pixels and returns a tab's context; the browser ends with the test.
// Every action run in the context is bounded by timeout.
func Start(t testing.TB, width, height int, timeout time.Duration) context.Context {
	t.Helper()
	exe := executable()
	if exe == "" {
		msg := "chromium not found (on PATH as chromium, chromium-browser or google-chrome, or at STILLWATER_CHROMIUM): install it (deploy/setup installs Debian's chromium package) or set STILLWATER_CHROMIUM to its path"
		if os.Getenv("STILLWATER_REQUIRE_BROWSER") == "1" {
			t.Fatal(msg + "; STILLWATER_REQUIRE_BROWSER=1 makes this a failure")
		}
		t.Skip(msg + "; browser tests skipped")
	}
	opts := append(chromedp.DefaultExecAllocatorOptions[:],
		chromedp.ExecPath(exe),
		chromedp.WindowSize(width, height),
		chromedp.Flag("hide-scrollbars", true),
		chromedp.Flag("font-render-hinting", "none"),
		chromedp.Env("TZ=UTC", "LANG=en_GB.UTF-8"),
		chromedp.Flag("lang", "en-GB"),
	)
	if os.Geteuid() == 0 {
		// Chromium's sandbox refuses to run as root.
		opts = append(opts, chromedp.NoSandbox)
	}
	actx, cancelAlloc := chromedp.NewExecAllocator(context.Background(), opts...)
	ctx, cancelTab := chromedp.NewContext(actx)
	ctx, cancelTime := context.WithTimeout(ctx, timeout)
	t.Cleanup(func() {
		cancelTime()
		cancelTab()
		cancelAlloc()
	})
	if err := chromedp.Do(ctx, chromedp.EmulateViewport(int64(width), int64(height), chromedp.EmulateScale(1))); err != nil {
		t.Fatalf("start %s: %v", exe, err)
	}
	return ctx
}

// Eval runs a JavaScript expression and returns its value.
func Eval[T any](t testing.TB, ctx context.Context, js string) T {
	t.Helper()
	v, err := chromedp.Run(ctx, chromedp.Evaluate[T](js, chromedp.EvalAwaitPromise))
	if err != nil {
		t.Fatalf("evaluate %s: %v", js, err)
	}
	return v
}

// WaitFor waits until the JavaScript expression is truthy; what says what
// is awaited, for the failure message.
func WaitFor(t testing.TB, ctx context.Context, what, js string) {
	t.Helper()
	if _, err := chromedp.Run(ctx, chromedp.Poll[chromedp.Void](js, chromedp.WithPollingInterval(50*time.Millisecond), chromedp.WithPollingTimeout(20*time.Second))); err != nil {
		t.Fatalf("waiting for %s (%s): %v", what, js, err)
	}
}

// Do runs actions, failing the test on an error.
func Do(t testing.TB, ctx context.Context, what string, actions ...chromedp.Action[chromedp.Void]) {
	t.Helper()
	if err := chromedp.Do(ctx, actions...); err != nil {
		t.Fatalf("%s: %v", what, err)
	}
}

// HorizontalOverflow returns how many CSS pixels the page, and an open
// dialog, are wider than the viewport; 0 means no horizontal scroll.
func HorizontalOverflow(t testing.TB, ctx context.Context) float64 {
	t.Helper()
	return Eval[float64](t, ctx, `(() => {
		const d = document.documentElement;
		let over = Math.max(d.scrollWidth, document.body.scrollWidth) - d.clientWidth;
		for (const dlg of document.querySelectorAll("dialog[open]")) {
			over = Math.max(over, dlg.scrollWidth - dlg.clientWidth, dlg.getBoundingClientRect().right - d.clientWidth);
		}
		return over;
	})()`)
}

// Screen writes the viewport as a PNG to dir/name when update is true,
// recompressed, and fails when it is over MaxScreenBytes.
func Screen(t testing.TB, ctx context.Context, update bool, dir, name string) {
	t.Helper()
	if !update {
		return
	}
	raw, err := chromedp.Run(ctx, chromedp.CaptureScreenshot())
	if err != nil {
		t.Fatalf("screenshot %s: %v", name, err)
	}
	img, err := png.Decode(bytes.NewReader(raw))
	if err != nil {
		t.Fatalf("screenshot %s: %v", name, err)
	}
	b, err := encodeSmall(img)
	if err != nil {
		t.Fatalf("screenshot %s: %v", name, err)
	}
	if len(b) > MaxScreenBytes {
		t.Fatalf("screenshot %s is %d KiB, over the %d KiB a README picture may take", name, len(b)>>10, MaxScreenBytes>>10)
	}
	if err := os.MkdirAll(dir, 0o755); err != nil {
		t.Fatal(err)
	}
	p := filepath.Join(dir, name)
	if err := os.WriteFile(p, b, 0o644); err != nil {
		t.Fatal(err)
	}
	t.Logf("wrote %s (%d KiB, %d×%d)", p, len(b)>>10, img.Bounds().Dx(), img.Bounds().Dy())
}

// encodeSmall encodes img as a PNG, in 216 colours when full colour
// takes more than MaxScreenBytes.
func encodeSmall(img image.Image) ([]byte, error) {
	var b bytes.Buffer
	enc := png.Encoder{CompressionLevel: png.BestCompression}
	if err := enc.Encode(&b, img); err != nil {
		return nil, fmt.Errorf("encode png: %w", err)
	}
	if b.Len() <= MaxScreenBytes {
		return b.Bytes(), nil
	}
	pal := image.NewPaletted(img.Bounds(), palette.WebSafe)
	draw.Draw(pal, pal.Bounds(), img, img.Bounds().Min, draw.Src)
	b.Reset()
	if err := enc.Encode(&b, pal); err != nil {
		return nil, fmt.Errorf("encode png: %w", err)
	}
	return b.Bytes(), nil
}
