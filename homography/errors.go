package homography

import "errors"

// Sentinel errors that callers (the installer UI, config validation) can
// branch on with errors.Is. The wrapping error names the corner or point
// and says how to fix it.
var (
	// ErrCornerCount means ValidateCorners was not given exactly four
	// corners A, B, C, D.
	ErrCornerCount = errors.New("wrong number of corners")

	// ErrCornerOutsideImage means a corner is not a finite pixel position
	// inside the camera frame.
	ErrCornerOutsideImage = errors.New("corner outside the image")

	// ErrDuplicateCorner means two corners were clicked at (nearly) the
	// same pixel.
	ErrDuplicateCorner = errors.New("duplicate corner")

	// ErrCollinearCorners means three corners lie (nearly) on one line, so
	// the four corners do not span a quadrilateral.
	ErrCollinearCorners = errors.New("three corners are collinear")

	// ErrSelfIntersecting means the corners, in the order given, make a
	// bow-tie and no reordering that keeps A first and B next to A fixes
	// it.
	ErrSelfIntersecting = errors.New("corner outline crosses itself")

	// ErrNotConvex means one corner lies inside the triangle of the other
	// three, so no ordering makes a convex pool outline.
	ErrNotConvex = errors.New("corner outline is not convex")

	// ErrNearSingular means a solved homography is (nearly) degenerate or
	// sends a calibration point to infinity.
	ErrNearSingular = errors.New("homography is nearly singular")

	// ErrReprojection means a solved homography misses its calibration
	// points by more than the allowed error.
	ErrReprojection = errors.New("reprojection error too large")

	// ErrTooFewInliers means robust fitting could not find four pairs that
	// agree with one homography.
	ErrTooFewInliers = errors.New("too few inliers")
)
