// Package remux keeps a camera's main stream as a rolling pre-roll on disk
// without decoding it, and cuts alarm clips from it.
//
// Decoding a camera's full-resolution stream costs more than everything
// else the detector does, and the detector does not need it: it searches
// the camera's low-resolution sub stream. The main stream is needed only
// as evidence. So a supervised ffmpeg child copies its packets (-c copy,
// no decoding) into short MPEG-TS segments in a ring directory, named by
// a sequence number; the Recorder notes when each segment first appears
// (wall time), deletes segments older than the pre-roll, and cuts a clip
// by joining the segments that cover the wanted span (the concat protocol,
// byte by byte, which MPEG-TS allows) and copying them into an MP4. A
// child that exits or stops writing is restarted with backoff; its
// messages go to the log; it is killed with the Recorder (and, should the
// daemon die, by the kernel: Pdeathsig).
package remux

import (
	"context"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"os"
	"os/exec"
	"path/filepath"
	"sort"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"time"
)

// Config sets up a Recorder.
type Config struct {
	// Source is the stream copied: an rtsp(s):// or http(s):// URL, or a
	// video file.
	Source string
	// Transport is "tcp" or "udp" for RTSP; empty lets FFmpeg choose.
	Transport string
	// Realtime reads a file source at its own frame rate, as a camera
	// sends it; Loop plays it again from the start at its end.
	Realtime, Loop bool
	// Dir is the ring directory. Segments and clip lists live here; files
	// of the ring's own naming left in it are removed at start.
	Dir string
	// Segment is the target length of a segment; the cut comes at the
	// first key frame after it. Zero selects 2 s.
	Segment time.Duration
	// Keep is how much of the stream is kept behind the newest segment
	// when no clip needs more; zero selects 10 s.
	Keep time.Duration
	// FFmpeg is the ffmpeg binary; empty looks for "ffmpeg" on PATH.
	FFmpeg string
	// Log receives the child's messages and its restarts; nil discards.
	Log *slog.Logger
	// MinBackoff and MaxBackoff bound the wait before restarting a child
	// that exited: it doubles from MinBackoff (zero: 500 ms) up to
	// MaxBackoff (zero: 10 s), and starts again from MinBackoff after a
	// child that ran for a minute.
	MinBackoff, MaxBackoff time.Duration
	// StallAfter is how long a running child may go without writing a
	// byte before it is killed and restarted; zero selects 10 s.
	StallAfter time.Duration
	// OnState, if set, is called when the recorder starts writing
	// (up true: the first data of a child appeared) and whenever a child
	// exits before Run is stopped (up false, with its error). It must not
	// call the Recorder.
	OnState func(up bool, err error)
}

func (c Config) withDefaults() Config {
	if c.Segment <= 0 {
		c.Segment = 2 * time.Second
	}
	if c.Keep <= 0 {
		c.Keep = 10 * time.Second
	}
	if c.FFmpeg == "" {
		c.FFmpeg = "ffmpeg"
	}
	if c.Log == nil {
		c.Log = slog.New(slog.NewTextHandler(io.Discard, nil))
	}
	if c.MinBackoff <= 0 {
		c.MinBackoff = 500 * time.Millisecond
	}
	if c.MaxBackoff <= 0 {
		c.MaxBackoff = 10 * time.Second
	}
	if c.StallAfter <= 0 {
		c.StallAfter = 10 * time.Second
	}
	return c
}

// segment is one file of the ring.
type segment struct {
	num   int
	name  string
	run   int       // which child wrote it
	start time.Time // when it first appeared
	end   time.Time // when the next one appeared, or its child ended; zero while written
	size  int64
	held  int // clips being cut from it
}

func (s *segment) done() bool { return !s.end.IsZero() }

// ClipResult reports one clip: finished, or failed.
type ClipResult struct {
	Path string
	// From and To are the wall-clock span the clip's segments cover (when
	// each first appeared on disk, so the pictures in them were taken a
	// little earlier, by the stream's own delay).
	From, To time.Time
	// WantFrom and WantTo is the span asked for.
	WantFrom, WantTo time.Time
	Segments         int
	Bytes            int64
	// Took is the time from the request to the file being complete,
	// the post-roll included.
	Took time.Duration
	Err  error
}

// clipReq is a clip waiting for its post-roll.
type clipReq struct {
	path       string
	at         time.Time // the alarm
	from, to   time.Time
	asked      time.Time
	done       func(ClipResult)
	forceAfter time.Time // cut with what there is from then on
}

// Recorder runs the copying child and keeps the ring. Run supervises it;
// Clip may be called from any goroutine.
type Recorder struct {
	cfg Config

	mu      sync.Mutex
	segs    []*segment
	pending []*clipReq
	run     int // current child run, from 1
	nextNum int // first sequence number of the next child
	pid     int
	up      bool
	exitAt  time.Time // when the last child exited; zero while one runs
	newest  [2]int64  // sequence number and size of the newest segment, for stall detection

	cuts   chan cutJob
	cutsWG sync.WaitGroup
	// dumpExtra repeats the stream's codec set-up before key frames: a
	// network stream's comes out of band (RTSP's SDP), so segments after
	// the first would lack it; a file's is needed for codecs other than
	// H.264 and H.265, for which the MPEG-TS muxer repeats it itself.
	dumpExtra bool
}

// New checks the configuration and makes the ring directory.
func New(cfg Config) (*Recorder, error) {
	cfg = cfg.withDefaults()
	if cfg.Source == "" {
		return nil, errors.New("evidence recorder: no source")
	}
	if cfg.Dir == "" {
		return nil, errors.New("evidence recorder: no ring directory")
	}
	if strings.ContainsAny(cfg.Dir, "|") {
		return nil, fmt.Errorf("evidence recorder: ring directory %q: must not contain |", cfg.Dir)
	}
	switch cfg.Transport {
	case "", "tcp", "udp":
	default:
		return nil, fmt.Errorf("evidence recorder: transport %q: want tcp, udp or empty", cfg.Transport)
	}
	if err := os.MkdirAll(cfg.Dir, 0o750); err != nil {
		return nil, fmt.Errorf("evidence recorder: %w", err)
	}
	return &Recorder{cfg: cfg, cuts: make(chan cutJob, 16)}, nil
}

// segPrefix and segExt name the ring's segments: seg-000000012.ts.
const (
	segPrefix = "seg-"
	segExt    = ".ts"
)

// clean removes what an earlier recorder left in the ring.
func (r *Recorder) clean() {
	ents, err := os.ReadDir(r.cfg.Dir)
	if err != nil {
		return
	}
	for _, e := range ents {
		n := e.Name()
		if strings.HasPrefix(n, segPrefix) && strings.HasSuffix(n, segExt) {
			os.Remove(filepath.Join(r.cfg.Dir, n))
		}
	}
}

// args is the child's command line for the run's first sequence number.
func (r *Recorder) args(first int) []string {
	c := r.cfg
	a := []string{"-nostdin", "-hide_banner", "-loglevel", "warning"}
	switch {
	case strings.HasPrefix(c.Source, "rtsp://"), strings.HasPrefix(c.Source, "rtsps://"):
		if c.Transport != "" {
			a = append(a, "-rtsp_transport", c.Transport)
		}
		a = append(a, "-timeout", strconv.FormatInt(c.StallAfter.Microseconds(), 10))
	case strings.Contains(c.Source, "://"):
		a = append(a, "-rw_timeout", strconv.FormatInt(c.StallAfter.Microseconds(), 10))
	default:
		if c.Realtime {
			a = append(a, "-re")
		}
		if c.Loop {
			a = append(a, "-stream_loop", "-1")
		}
	}
	a = append(a, "-i", c.Source, "-map", "0:v:0", "-c", "copy")
	if r.dumpExtra {
		// The decoder's set-up (H.264 SPS and PPS, an MPEG-4 VOL header)
		// is put before every key frame, so that any run of segments
		// decodes on its own.
		a = append(a, "-bsf:v", "dump_extra")
	}
	return append(a,
		"-f", "segment", "-segment_format", "mpegts",
		"-segment_time", strconv.FormatFloat(c.Segment.Seconds(), 'f', 3, 64),
		"-segment_start_number", strconv.Itoa(first),
		filepath.Join(c.Dir, segPrefix+"%09d"+segExt))
}

// PID returns the running child's process id, or 0.
func (r *Recorder) PID() int {
	r.mu.Lock()
	defer r.mu.Unlock()
	return r.pid
}

// Up reports whether a child is running and has written a segment.
func (r *Recorder) Up() bool {
	r.mu.Lock()
	defer r.mu.Unlock()
	return r.up
}

// Run starts the child and keeps it running until ctx ends; then it stops
// the child, cuts every clip still waiting from what the ring holds, and
// returns once that is done.
func (r *Recorder) Run(ctx context.Context) error {
	if _, err := exec.LookPath(r.cfg.FFmpeg); err != nil {
		return fmt.Errorf("evidence recorder: ffmpeg not found: %w", err)
	}
	r.clean()
	r.dumpExtra = strings.Contains(r.cfg.Source, "://") || !annexBCodec(r.cfg.FFmpeg, r.cfg.Source)
	r.cutsWG.Add(1)
	go r.cutter()
	defer func() {
		r.mu.Lock()
		now := time.Now()
		for _, s := range r.segs {
			if !s.done() {
				s.end = now
			}
		}
		for _, q := range r.pending {
			r.startCut(q)
		}
		r.pending = nil
		r.mu.Unlock()
		close(r.cuts)
		r.cutsWG.Wait()
	}()
	log := r.cfg.Log
	wait := r.cfg.MinBackoff
	for {
		began := time.Now()
		err := r.child(ctx)
		if ctx.Err() != nil {
			return nil
		}
		if time.Since(began) >= time.Minute {
			wait = r.cfg.MinBackoff
		}
		log.Warn("evidence recorder exited; restarting", "err", err, "ran", time.Since(began).Round(time.Millisecond), "in", wait)
		if !r.idle(ctx, wait) {
			return nil
		}
		wait = min(2*wait, r.cfg.MaxBackoff)
	}
}

// tick is how often the ring is looked at: how exactly a segment's start
// is known.
const tick = 100 * time.Millisecond

// idle keeps the ring (clips may fall due) while no child runs, for d.
func (r *Recorder) idle(ctx context.Context, d time.Duration) bool {
	t := time.NewTicker(tick)
	defer t.Stop()
	end := time.After(d)
	for {
		select {
		case <-ctx.Done():
			return false
		case <-end:
			return true
		case <-t.C:
			r.keep(time.Now())
		}
	}
}

// child runs one ffmpeg until it exits, stalls or ctx ends.
func (r *Recorder) child(ctx context.Context) error {
	r.mu.Lock()
	r.run++
	run, first := r.run, r.nextNum
	r.mu.Unlock()
	cmd := exec.Command(r.cfg.FFmpeg, r.args(first)...)
	lines := &lineLog{log: r.cfg.Log, limit: 20, per: time.Minute}
	cmd.Stdout, cmd.Stderr = lines, lines
	// Its own process group (a terminal's Ctrl-C goes to the daemon, which
	// stops it in order), and killed by the kernel if the daemon dies.
	cmd.SysProcAttr = &syscall.SysProcAttr{Setpgid: true, Pdeathsig: syscall.SIGKILL}
	if err := cmd.Start(); err != nil {
		return fmt.Errorf("start ffmpeg: %w", err)
	}
	exited := make(chan error, 1)
	go func() { exited <- cmd.Wait() }()
	r.mu.Lock()
	r.pid, r.exitAt = cmd.Process.Pid, time.Time{}
	r.mu.Unlock()
	r.cfg.Log.Info("evidence recorder started", "pid", cmd.Process.Pid, "source", redact(r.cfg.Source))

	t := time.NewTicker(tick)
	defer t.Stop()
	lastWrite := time.Now()
	var err error
loop:
	for {
		select {
		case <-ctx.Done():
			stop(cmd, exited)
			break loop
		case err = <-exited:
			if err == nil {
				err = errors.New("ffmpeg ended")
			}
			break loop
		case <-t.C:
			now := time.Now()
			if r.scan(run, now) {
				lastWrite = now
			}
			if now.Sub(lastWrite) > r.cfg.StallAfter {
				r.cfg.Log.Warn("evidence recorder wrote nothing; killing it", "for", now.Sub(lastWrite).Round(time.Millisecond), "pid", cmd.Process.Pid)
				stop(cmd, exited)
				err = fmt.Errorf("no data for %v", r.cfg.StallAfter)
				break loop
			}
			r.keep(now)
		}
	}
	now := time.Now()
	r.scan(run, now)
	r.mu.Lock()
	for _, s := range r.segs {
		if s.run == run && !s.done() {
			s.end = now
		}
	}
	r.pid, r.up, r.exitAt = 0, false, now
	r.mu.Unlock()
	lines.flush()
	if ctx.Err() == nil && r.cfg.OnState != nil {
		r.cfg.OnState(false, err)
	}
	r.keep(now)
	return err
}

// stop asks the child to finish its segment (SIGTERM), then kills its
// process group after 2 s.
func stop(cmd *exec.Cmd, exited <-chan error) {
	pg := -cmd.Process.Pid
	syscall.Kill(pg, syscall.SIGTERM)
	select {
	case <-exited:
	case <-time.After(2 * time.Second):
		syscall.Kill(pg, syscall.SIGKILL)
		<-exited
	}
}

// scan notes new segments of the run and their sizes; it reports whether
// anything was written since the last scan.
func (r *Recorder) scan(run int, now time.Time) bool {
	ents, err := os.ReadDir(r.cfg.Dir)
	if err != nil {
		return false
	}
	r.mu.Lock()
	grew, up := r.note(ents, run, now)
	r.mu.Unlock()
	if up && r.cfg.OnState != nil {
		r.cfg.OnState(true, nil)
	}
	return grew
}

// note records the ring's files (r.mu held); up is true when this is the
// first data of a child.
func (r *Recorder) note(ents []os.DirEntry, run int, now time.Time) (grew, up bool) {
	known := map[string]*segment{}
	for _, s := range r.segs {
		known[s.name] = s
	}
	for _, e := range ents {
		n := e.Name()
		if !strings.HasPrefix(n, segPrefix) || !strings.HasSuffix(n, segExt) {
			continue
		}
		num, err := strconv.Atoi(strings.TrimSuffix(strings.TrimPrefix(n, segPrefix), segExt))
		if err != nil {
			continue
		}
		info, err := e.Info()
		if err != nil {
			continue
		}
		s := known[n]
		if s == nil {
			if num < r.nextNum {
				continue // an old run's segment pruned meanwhile, or foreign
			}
			s = &segment{num: num, name: n, run: run, start: now}
			r.segs = append(r.segs, s)
			r.nextNum = num + 1
			grew = true
		}
		s.size = info.Size()
		if s.run == run && int64(num) >= r.newest[0] {
			r.newest[0] = int64(num)
			if s.size != r.newest[1] {
				r.newest[1] = s.size
				grew = true
			}
		}
	}
	sort.Slice(r.segs, func(i, j int) bool { return r.segs[i].num < r.segs[j].num })
	// A segment is complete once its successor of the same run appeared.
	for i := 0; i+1 < len(r.segs); i++ {
		a, b := r.segs[i], r.segs[i+1]
		if a.run == b.run && !a.done() {
			a.end = b.start
		}
	}
	if grew && !r.up {
		r.up, up = true, true
		r.cfg.Log.Info("evidence recorder writing", "run", run)
	}
	return grew, up
}

// keep cuts the clips that are due and removes segments no clip needs.
func (r *Recorder) keep(now time.Time) {
	r.mu.Lock()
	defer r.mu.Unlock()
	left := r.pending[:0]
	for _, q := range r.pending {
		if r.due(q, now) {
			r.startCut(q)
			continue
		}
		left = append(left, q)
	}
	clear(r.pending[len(left):])
	r.pending = left

	oldest := now.Add(-r.cfg.Keep - r.cfg.Segment)
	for _, q := range r.pending {
		if q.from.Before(oldest) {
			oldest = q.from
		}
	}
	kept := r.segs[:0]
	for _, s := range r.segs {
		if s.done() && s.held == 0 && s.end.Before(oldest) {
			os.Remove(filepath.Join(r.cfg.Dir, s.name))
			continue
		}
		kept = append(kept, s)
	}
	clear(r.segs[len(kept):])
	r.segs = kept
}

// latency is how much later than the detection frame a picture may reach
// the ring: a clip waits for a segment reaching this far past its end.
const latency = time.Second

// due reports whether the ring holds the clip's whole span, or will not.
func (r *Recorder) due(q *clipReq, now time.Time) bool {
	if !now.Before(q.forceAfter) {
		return true
	}
	want := q.to.Add(latency)
	for _, s := range r.segs {
		if s.done() && !s.end.Before(want) {
			return true
		}
	}
	// No child runs: nothing more will come for now.
	return !r.exitAt.IsZero() && r.exitAt.After(q.to)
}

// Clip asks for a clip at path covering pre before at to post after it.
// It returns at once; the clip is cut once the ring holds its end (or
// can no longer get it: the child is down), and done is called on the
// recorder's goroutine. If a clip still waiting for its end overlaps the
// span, that clip is extended instead: Clip returns its path and true,
// and done is not called for this request.
func (r *Recorder) Clip(path string, at time.Time, pre, post time.Duration, done func(ClipResult)) (string, bool) {
	from, to := at.Add(-pre), at.Add(post)
	r.mu.Lock()
	defer r.mu.Unlock()
	for _, q := range r.pending {
		if !from.After(q.to) {
			if to.After(q.to) {
				q.to = to
				q.forceAfter = r.forceAt(to)
			}
			return q.path, true
		}
	}
	r.pending = append(r.pending, &clipReq{path: path, at: at, from: from, to: to, asked: time.Now(), done: done, forceAfter: r.forceAt(to)})
	return path, false
}

// forceAt is when a clip ending at to is cut with whatever the ring has.
func (r *Recorder) forceAt(to time.Time) time.Time {
	return to.Add(latency + 2*r.cfg.Segment + r.cfg.StallAfter)
}

// cutJob is one clip to cut from held segments.
type cutJob struct {
	req  *clipReq
	segs []*segment
}

// startCut picks the clip's segments, holds them and queues the cut
// (r.mu held). The segments all come from one child: each child's
// timestamps start afresh, and a clip is joined byte by byte. It takes
// the child that was writing at the alarm (or the latest before it; the
// first after it if none was).
func (r *Recorder) startCut(q *clipReq) {
	run := 0
	for _, s := range r.segs {
		if run == 0 || !s.start.After(q.at) {
			run = s.run
		}
	}
	var pick []*segment
	for _, s := range r.segs {
		end := s.end
		if !s.done() {
			end = time.Now()
		}
		if s.run == run && end.After(q.from) && s.start.Before(q.to.Add(latency)) {
			s.held++
			pick = append(pick, s)
		}
	}
	job := cutJob{req: q, segs: pick}
	select {
	case r.cuts <- job:
	default:
		for _, s := range pick {
			s.held--
		}
		go q.done(ClipResult{Path: q.path, WantFrom: q.from, WantTo: q.to, Err: errors.New("too many clips waiting to be cut")})
	}
}

// cutter cuts clips one at a time.
func (r *Recorder) cutter() {
	defer r.cutsWG.Done()
	for j := range r.cuts {
		res := r.cut(j)
		r.mu.Lock()
		for _, s := range j.segs {
			s.held--
		}
		r.mu.Unlock()
		if j.req.done != nil {
			j.req.done(res)
		}
	}
}

// cut joins the job's segments into an MP4 without decoding: the
// segments' bytes in order (MPEG-TS may be joined so), copied into the
// new container by ffmpeg. The file appears under its name only once
// complete.
func (r *Recorder) cut(j cutJob) (res ClipResult) {
	q := j.req
	res = ClipResult{Path: q.path, WantFrom: q.from, WantTo: q.to, Segments: len(j.segs)}
	defer func() { res.Took = time.Since(q.asked) }()
	if len(j.segs) == 0 {
		res.Err = fmt.Errorf("clip %s: the ring holds nothing from %s to %s", q.path, q.from.Format(time.RFC3339), q.to.Format(time.RFC3339))
		return res
	}
	res.From, res.To = j.segs[0].start, j.segs[len(j.segs)-1].end
	if res.To.IsZero() {
		res.To = time.Now()
	}
	names := make([]string, len(j.segs))
	for i, s := range j.segs {
		names[i] = s.name
		res.Bytes += s.size
	}
	part := q.path + ".part"
	comment := fmt.Sprintf("stillwater evidence: main stream copied without decoding, %s to %s", res.From.UTC().Format(time.RFC3339Nano), res.To.UTC().Format(time.RFC3339Nano))
	cmd := exec.Command(r.cfg.FFmpeg, "-nostdin", "-hide_banner", "-loglevel", "error",
		"-i", "concat:"+strings.Join(names, "|"),
		"-map", "0:v:0", "-c", "copy", "-movflags", "+faststart",
		"-metadata", "creation_time="+res.From.UTC().Format("2006-01-02T15:04:05.000000Z"),
		"-metadata", "comment="+comment,
		"-f", "mp4", "-y", part)
	cmd.Dir = r.cfg.Dir
	out, err := cmd.CombinedOutput()
	if err == nil {
		err = os.Rename(part, q.path)
	}
	if err != nil {
		os.Remove(part)
		res.Err = fmt.Errorf("clip %s: ffmpeg: %v: %s", q.path, err, strings.TrimSpace(string(out)))
	}
	return res
}

// annexBCodec reports whether a file's video is H.264 or H.265 (whose
// set-up the MPEG-TS muxer repeats itself), asking ffprobe beside ffmpeg;
// when it cannot tell it says yes.
func annexBCodec(ffmpeg, file string) bool {
	probe := "ffprobe"
	if dir := filepath.Dir(ffmpeg); dir != "." {
		probe = filepath.Join(dir, "ffprobe")
	}
	out, err := exec.Command(probe, "-v", "error", "-select_streams", "v:0", "-show_entries", "stream=codec_name", "-of", "csv=p=0", file).Output()
	if err != nil {
		return true
	}
	switch strings.TrimSpace(string(out)) {
	case "h264", "hevc":
		return true
	}
	return false
}

// redact hides a password in a URL for the log.
func redact(src string) string {
	i := strings.Index(src, "://")
	at := strings.LastIndex(src, "@")
	if i < 0 || at < i {
		return src
	}
	cred := src[i+3 : at]
	if u, _, ok := strings.Cut(cred, ":"); ok {
		return src[:i+3] + u + ":xxxxx" + src[at:]
	}
	return src
}
