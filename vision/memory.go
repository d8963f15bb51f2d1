package vision

// #include "shim.h"
import "C"

import (
	"fmt"
	"runtime"
)

// The C heap is where OpenCV's Mats and FFmpeg's decoders live, outside
// Go's garbage collector. glibc's malloc gives each thread that meets
// contention an arena of its own, up to eight per CPU; cgo calls run on
// whichever OS thread the goroutine is on, so a Mat freed by one camera
// is often freed into an arena another thread then never reuses, and the
// resident size creeps up while the memory in use does not.

// LimitCHeaps caps the C allocator's arenas at n (n ≥ 1). Call it once at
// start-up, before the cameras start: arenas already made stay.
func LimitCHeaps(n int) error {
	if n < 1 || n > 8*runtime.NumCPU() {
		return fmt.Errorf("c heaps: %d arenas; want 1 to %d", n, 8*runtime.NumCPU())
	}
	if C.sw_malloc_arenas(C.int(n)) != 1 {
		return fmt.Errorf("c heaps: the C allocator refused a cap of %d arenas", n)
	}
	return nil
}

// CHeap is what the C allocator holds: bytes handed out and in use, and
// bytes free inside its arenas, not yet given back to the system.
type CHeap struct {
	InUse, Free uint64
}

// CHeapStats reads the C allocator's counters (all arenas).
func CHeapStats() CHeap {
	var inuse, free C.ulonglong
	C.sw_malloc_stats(&inuse, &free)
	return CHeap{InUse: uint64(inuse), Free: uint64(free)}
}

// TrimCHeap gives the free pages inside the C allocator's arenas back to
// the system; it reports whether any were. It locks each arena in turn,
// so it is for a slow timer (once a minute), not the frame path.
func TrimCHeap() bool { return C.sw_malloc_trim() == 1 }
