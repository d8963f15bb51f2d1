package vision

import (
	"errors"
	"fmt"
	"image"
	"os"
	"sync"
	"sync/atomic"
	"time"

	"gocv.io/x/gocv"

	"stillwater/vision/decode"
)

// EvidenceWritten reports one piece of evidence the writer has finished.
type EvidenceWritten struct {
	Kind    string // "snapshot" or "clip"
	Path    string
	Frames  int // frames in the clip (packets, for an MP4 of kept packets)
	Dropped int // frames left out of the clip because the writer was behind
	// Took is, for a snapshot, the time from the request to the file
	// being complete; for a clip, from the request to its last frame.
	Took time.Duration
	Err  error
	// Recording is the clip the writer has open afterwards, "" when none:
	// retention must not remove it.
	Recording string
}

// evidenceQueue bounds the writer's queue. Frames in it share their JPEG
// data with the pre-roll ring, so a full queue costs little more memory
// than the ring; past it, frames are left out of the clip (and counted)
// rather than holding up the camera.
const evidenceQueue = 256

var errWriterBehind = errors.New("the evidence writer is behind")

type clipJob struct {
	path  string
	until time.Duration
	fps   float64
	size  image.Point
	pre   []jpegFrame
	// params, when not nil, make the clip an MP4 of the stream's packets,
	// prePackets its pre-roll; fps, size and pre are then unused.
	params     *decode.Params
	prePackets []decode.Packet
	asked      time.Time
}

type snapJob struct {
	path    string
	img     gocv.Mat // owned by the job
	quality int
	asked   time.Time
}

type evJob struct {
	frame  *jpegFrame
	pk     *packetBatch
	clip   *clipJob
	snap   *snapJob
	extend time.Duration // > 0: the open clip now ends here
	finish bool
	synced chan struct{}
}

// evidenceWriter is one camera's evidence goroutine: the camera hands it
// jobs without waiting, and it writes clips (avi.go) and snapshots.
type evidenceWriter struct {
	jobs    chan evJob
	done    chan struct{}
	dropped atomic.Int64 // frames the camera could not queue

	mu       sync.Mutex
	notify   func(EvidenceWritten)
	firstErr error
}

func startEvidenceWriter(notify func(EvidenceWritten)) *evidenceWriter {
	w := &evidenceWriter{jobs: make(chan evJob, evidenceQueue), done: make(chan struct{}), notify: notify}
	go w.run()
	return w
}

func (w *evidenceWriter) setNotify(f func(EvidenceWritten)) {
	w.mu.Lock()
	w.notify = f
	w.mu.Unlock()
}

func (w *evidenceWriter) put(j evJob) bool {
	select {
	case w.jobs <- j:
		return true
	default:
		return false
	}
}

func (w *evidenceWriter) frame(f jpegFrame) {
	if !w.put(evJob{frame: &f}) {
		w.dropped.Add(1)
	}
}

// packets queues b for the open clip; false when the queue was full and
// b is left out (and counted).
func (w *evidenceWriter) packets(b packetBatch) bool {
	if !w.put(evJob{pk: &b}) {
		w.dropped.Add(int64(len(b.pkts)))
		return false
	}
	return true
}

// skipped counts packets left out of a clip without being queued.
func (w *evidenceWriter) skipped(n int) { w.dropped.Add(int64(n)) }

func (w *evidenceWriter) start(c clipJob) error {
	c.asked = time.Now()
	if !w.put(evJob{clip: &c}) {
		return fmt.Errorf("%w (%d jobs queued)", errWriterBehind, len(w.jobs))
	}
	return nil
}

// extend and finish are best effort: when the queue is full the clip
// ends at its old time, or at the next start or stop.
func (w *evidenceWriter) extend(until time.Duration) { w.put(evJob{extend: max(until, 1)}) }
func (w *evidenceWriter) finish()                    { w.put(evJob{finish: true}) }

func (w *evidenceWriter) snapshot(s snapJob) error {
	s.asked = time.Now()
	if !w.put(evJob{snap: &s}) {
		return fmt.Errorf("%w (%d jobs queued)", errWriterBehind, len(w.jobs))
	}
	return nil
}

// sync waits until everything queued so far is written.
func (w *evidenceWriter) sync() {
	ch := make(chan struct{})
	w.jobs <- evJob{synced: ch}
	<-ch
}

// stop writes what is queued, finishes the open clip and ends the
// goroutine. It returns the first error no OnWritten callback took.
func (w *evidenceWriter) stop() error {
	close(w.jobs)
	<-w.done
	w.mu.Lock()
	defer w.mu.Unlock()
	return w.firstErr
}

func (w *evidenceWriter) report(ev EvidenceWritten) {
	w.mu.Lock()
	f := w.notify
	if f == nil && ev.Err != nil && w.firstErr == nil {
		w.firstErr = ev.Err
	}
	w.mu.Unlock()
	if f != nil {
		f(ev)
	}
}

func (w *evidenceWriter) run() {
	defer close(w.done)
	var (
		avi      *aviWriter
		mux      *decode.Muxer
		base     int64 // the MP4 clip's first decoding time: its zero
		job      clipJob
		dropBase int64
		failed   error
	)
	end := func() {
		if avi == nil && mux == nil && failed == nil {
			return
		}
		ev := EvidenceWritten{Kind: "clip", Path: job.path, Took: time.Since(job.asked), Dropped: int(w.dropped.Load() - dropBase), Err: failed}
		if avi != nil {
			ev.Frames = avi.frames()
			if err := avi.close(); err != nil && ev.Err == nil {
				ev.Err = err
			}
		}
		if mux != nil {
			ev.Frames = mux.Packets()
			if err := mux.Close(); err != nil && ev.Err == nil {
				ev.Err = err
			}
		}
		if ev.Err != nil {
			ev.Err = fmt.Errorf("clip %s: %w", job.path, ev.Err)
		}
		avi, mux, failed = nil, nil, nil
		w.report(ev)
	}
	writePacket := func(p decode.Packet) {
		if mux == nil {
			return
		}
		if mux.Packets() == 0 {
			base = p.DTS
		}
		p.DTS -= base
		p.PTS -= base
		if err := mux.WritePacket(p); err != nil {
			failed = err
			mux.Close()
			mux = nil
		}
	}
	write := func(data []byte) {
		if avi == nil {
			return
		}
		if err := avi.add(data); err != nil {
			failed = err
			avi.close()
			avi = nil
		}
	}
	for j := range w.jobs {
		switch {
		case j.synced != nil:
			close(j.synced)
		case j.clip != nil && j.clip.params != nil:
			end()
			job, dropBase = *j.clip, w.dropped.Load()
			m, err := decode.CreateMP4(job.path, *job.params, "")
			if err != nil {
				failed = err
				end()
				continue
			}
			mux = m
			for _, p := range job.prePackets {
				writePacket(p)
			}
			job.prePackets = nil
		case j.clip != nil:
			end()
			job, dropBase = *j.clip, w.dropped.Load()
			a, err := createAVI(job.path, job.size.X, job.size.Y, job.fps)
			if err != nil {
				failed = err
				end()
				continue
			}
			avi = a
			for _, f := range job.pre {
				write(f.data)
			}
			job.pre = nil
		case j.frame != nil:
			if avi == nil {
				continue
			}
			write(j.frame.data)
			if j.frame.media >= job.until {
				end()
			}
		case j.pk != nil:
			if mux == nil {
				continue
			}
			for _, p := range j.pk.pkts {
				writePacket(p)
			}
			if j.pk.media >= job.until {
				end()
			}
		case j.extend > 0:
			job.until = j.extend
		case j.finish:
			end()
		case j.snap != nil:
			w.writeSnapshot(*j.snap, func() string {
				if avi != nil || mux != nil {
					return job.path
				}
				return ""
			}())
		}
	}
	end()
}

// writeSnapshot encodes the annotated frame and writes it under a
// temporary name first, so that the named file is whole once it exists.
func (w *evidenceWriter) writeSnapshot(s snapJob, recording string) {
	defer s.img.Close()
	ev := EvidenceWritten{Kind: "snapshot", Path: s.path, Recording: recording}
	data, err := encodeJPEG(s.img, s.quality)
	if err == nil {
		tmp := s.path + ".part"
		if err = os.WriteFile(tmp, data, 0o640); err == nil {
			if err = os.Rename(tmp, s.path); err != nil {
				os.Remove(tmp)
			}
		}
	}
	ev.Took = time.Since(s.asked)
	if err != nil {
		ev.Err = fmt.Errorf("snapshot %s: %w", s.path, err)
	}
	w.report(ev)
}
