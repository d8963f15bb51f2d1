package vision

import (
	"math"
	"time"

	"stillwater/vision/decode"
)

// packetRing is the pre-roll of a stream whose packets are kept instead of
// JPEG pictures of its frames (see streamCapture.packets). A clip must
// start at a key frame, so it holds the packets from the latest key frame
// at least the pre-roll old, and every packet since. Their times are put
// on one rising timeline: a looped file or a reconnected stream starts
// its times again, and a clip may span the seam.
type packetRing struct {
	params decode.Params
	ring   []keptPacket
	bytes  int
	// The timeline: offset is added to the stream's own times; last is
	// the latest decoding time given out; step the latest packet
	// duration seen.
	offset, last, step int64
	started            bool
}

type keptPacket struct {
	media time.Duration // of the frame Next returned with the packet
	p     decode.Packet
}

// packetBatch is the packets one Next read, on the ring's timeline.
type packetBatch struct {
	media time.Duration
	pkts  []decode.Packet
}

// Bounds of the ring beyond the pre-roll, for a stream with rare key
// frames or with times that barely move: past either, it starts at the
// next key frame (the clip's pre-roll is then shorter).
const (
	maxRingBytes   = 32 << 20
	maxRingPackets = 3000
)

// add puts pkts, read with the frame of media time media, on the timeline
// and into the ring, drops what the pre-roll no longer needs, and returns
// the packets as kept (a new slice; empty packets are left out).
func (r *packetRing) add(pkts []decode.Packet, media, preRoll time.Duration, fps float64) []decode.Packet {
	if len(pkts) == 0 {
		return nil
	}
	if r.step <= 0 {
		r.step = decode.Ticks / 10
		if fps > 0 {
			r.step = int64(math.Round(decode.Ticks / fps))
		}
	}
	out := make([]decode.Packet, 0, len(pkts))
	for _, p := range pkts {
		if len(p.Data) == 0 {
			continue // nothing to decode (some demuxers send side data alone)
		}
		p = r.place(p)
		out = append(out, p)
		r.ring = append(r.ring, keptPacket{media: media, p: p})
		r.bytes += len(p.Data)
	}
	r.trim(media - preRoll)
	return out
}

// place moves p onto the timeline.
func (r *packetRing) place(p decode.Packet) decode.Packet {
	d := p.DTS
	if d == decode.NoTime {
		d = p.PTS
	}
	if d == decode.NoTime { // no time at all: one step after the last
		d = r.last + r.step - r.offset
	}
	if r.started && d+r.offset <= r.last {
		// The stream started again (a loop, a reconnection) or stepped
		// back: carry on one step after the last packet.
		r.offset = r.last + r.step - d
	}
	if p.PTS == decode.NoTime {
		p.PTS = d
	}
	p.DTS, p.PTS = d+r.offset, p.PTS+r.offset
	r.last, r.started = p.DTS, true
	if p.Duration > 0 {
		r.step = p.Duration
	}
	return p
}

// trim keeps the packets from the latest key frame read at or before
// from, and within the bounds above.
func (r *packetRing) trim(from time.Duration) {
	cut := -1
	for i, k := range r.ring {
		if k.media > from {
			break
		}
		if k.p.Key {
			cut = i
		}
	}
	if cut < 0 && len(r.ring) > 0 && !r.ring[0].p.Key {
		cut = r.nextKey(0) // no key frame yet to start a clip at
	}
	r.drop(cut)
	for len(r.ring) > 0 && (r.bytes > maxRingBytes || len(r.ring) > maxRingPackets) {
		r.drop(r.nextKey(1))
	}
}

// nextKey returns the index of the first key packet at or after i, or
// len(ring) when there is none.
func (r *packetRing) nextKey(i int) int {
	for ; i < len(r.ring); i++ {
		if r.ring[i].p.Key {
			return i
		}
	}
	return len(r.ring)
}

// drop removes the first n packets.
func (r *packetRing) drop(n int) {
	if n <= 0 {
		return
	}
	for _, k := range r.ring[:n] {
		r.bytes -= len(k.p.Data)
	}
	m := copy(r.ring, r.ring[n:])
	clear(r.ring[m:])
	r.ring = r.ring[:m]
}
