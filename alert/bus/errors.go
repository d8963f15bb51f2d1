package bus

import "errors"

// ErrNotConnected means the connection to the bus is not up: Publish drops
// heartbeats rather than queue them, and the outbox waits.
var ErrNotConnected = errors.New("bus not connected")

// ErrOutboxFull means a message could not be queued: the outbox is at its
// bound and holds no low-priority message that could make room. Publish
// returns it wrapped; the message is lost and counted in Stats.Refused.
var ErrOutboxFull = errors.New("outbox full")
