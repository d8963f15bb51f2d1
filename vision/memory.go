package vision

// #include "shim.h"
import "C"

import (
	"fmt"
	"runtime"
)

// The C heap is where OpenCV's Mats and FFmpeg's decoders live, outside
// Go's garbage collector. glibc's malloc gives each thread that meets
// contention an arena of its own, up to eight per CPU, and serves blocks
// below a threshold from them; it raises that threshold (up to 32 MB) each
// time a large mapped block is freed (from glibc's manual, from memory),
// so that frame-sized buffers end up inside the arenas too. cgo calls run
// on whichever OS thread the goroutine is on, and FFmpeg's packets of
// every size come and go beside them: the free space inside the arenas
// grows in pieces too small to give back, and the resident size creeps up
// while the memory in use does not. Measured with eight 640×360 cameras
// and their copied 1080p evidence streams over 180 s (stillwater bench):
// glibc's defaults grew from 264 to 344 MB; two arenas and a fixed
// threshold of 128 KiB held 254 to 264 MB with the C heap in use flat, at
// no more CPU.

// CHeapMapFrom is the block size from which the C allocator maps blocks
// on their own, given back to the system when freed: glibc's starting
// value, kept fixed.
const CHeapMapFrom = 128 << 10

// LimitCHeaps caps the C allocator's arenas at n (n ≥ 1) and fixes its
// mapping threshold at CHeapMapFrom. Call it once at start-up, before the
// cameras start: arenas already made stay.
func LimitCHeaps(n int) error {
	if n < 1 || n > 8*runtime.NumCPU() {
		return fmt.Errorf("c heaps: %d arenas; want 1 to %d", n, 8*runtime.NumCPU())
	}
	if C.sw_malloc_arenas(C.int(n), C.int(CHeapMapFrom)) != 1 {
		return fmt.Errorf("c heaps: the C allocator refused a cap of %d arenas or a mapping threshold of %d bytes", n, CHeapMapFrom)
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
// so it is for a slow timer (seconds apart), not the frame path.
func TrimCHeap() bool { return C.sw_malloc_trim() == 1 }
