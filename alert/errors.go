package alert

import "errors"

// ErrStateUnreadable means the override state file exists but could not be
// read or parsed. LoadOverride returns it (wrapped) together with
// armed=true: a pool alarm that cannot tell whether an operator disarmed it
// must assume it is armed. Test for it with errors.Is.
var ErrStateUnreadable = errors.New("override state unreadable")

// ErrBusDown means the connection to the bus is not up: Publish drops
// heartbeats rather than queue them, and the outbox waits.
var ErrBusDown = errors.New("bus not connected")

// ErrOutboxFull means a message could not be queued: the outbox is at its
// bound and holds no low-priority message that could make room. Publish
// returns it wrapped; the message is lost and counted in Stats.Refused.
var ErrOutboxFull = errors.New("outbox full")
