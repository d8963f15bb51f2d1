//go:build !matprofile

package vision

// OpenMats reports false: Mats are only counted with -tags matprofile.
func OpenMats() (int, bool) { return 0, false }
