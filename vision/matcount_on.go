//go:build matprofile

package vision

import "gocv.io/x/gocv"

// OpenMats returns how many gocv Mats are open in the process, and true,
// when built with -tags matprofile; leak tests outside this package use it.
func OpenMats() (int, bool) { return gocv.MatProfile.Count(), true }
