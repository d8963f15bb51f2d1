package vision

// #include "shim.h"
import "C"

import (
	"fmt"
	"runtime"
)

// SetThreads sizes OpenCV's worker pool, which every camera of the
// process shares: n ≥ 1 threads, or 0 for OpenCV's default (one per CPU).
// Each camera already works on its own goroutine, so with several cameras
// on few cores a pool of one avoids handing each small image operation
// to other threads and back. Call it once, before the cameras start.
func SetThreads(n int) error {
	if n < 0 || n > 4*runtime.NumCPU() {
		return fmt.Errorf("opencv threads: %d; want 0 (OpenCV's default) to %d", n, 4*runtime.NumCPU())
	}
	if n == 0 {
		n = -1 // OpenCV: a negative count restores its default
	}
	C.sw_set_threads(C.int(n))
	return nil
}

// Threads is the size of OpenCV's worker pool.
func Threads() int { return int(C.sw_get_threads()) }
