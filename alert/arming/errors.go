package arming

import "errors"

// ErrStateUnreadable means a saved arming or override state exists but
// could not be read or parsed. New and LoadOverride return it (wrapped)
// with the cameras armed: a pool alarm that cannot tell whether an
// operator disarmed it must assume it is armed. Test for it with
// errors.Is.
var ErrStateUnreadable = errors.New("override state unreadable")
