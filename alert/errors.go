package alert

import "errors"

// ErrStateUnreadable means the override state file exists but could not be
// read or parsed. LoadOverride returns it (wrapped) together with
// armed=true: a pool alarm that cannot tell whether an operator disarmed it
// must assume it is armed. Test for it with errors.Is.
var ErrStateUnreadable = errors.New("override state unreadable")
