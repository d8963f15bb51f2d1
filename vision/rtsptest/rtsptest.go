// Package rtsptest runs a live RTSP stream on loopback for tests: Debian's
// rtsp-server-perl relay and an ffmpeg process pushing a clip to it in a
// loop over UDP (the relay takes RTP over UDP only). Readers connect to
// URL() with RTP over UDP. Tests can kill and restart the pusher to
// simulate a camera going away and coming back. Every child runs in its own
// process group and is killed by Close, which Start registers with
// t.Cleanup.
package rtsptest

import (
	"bufio"
	"errors"
	"fmt"
	"io"
	"math/rand"
	"net"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"strings"
	"syscall"
	"testing"
	"time"
)

// relayScript starts the relay like /usr/bin/rtsp-server-perl does, but
// also moves the module's RTP port base: the relay resets its port counter
// to that package variable whenever no stream is mounted, so the
// --rtp_start_port flag alone does not survive a pusher restart.
const relayScript = `use strict; use warnings; use AnyEvent; use RTSP::Server;
$RTSP::Server::RTP_START_PORT = shift @ARGV;
my $srv = RTSP::Server->new_with_options();
$srv->listen;
my $cv = AnyEvent->condvar;
$SIG{TERM} = $SIG{INT} = sub { $cv->send };
$cv->recv;`

// Server is a relay with an optional pusher.
type Server struct {
	clip, name string
	dir        string
	clientPort int // readers connect here
	sourcePort int // the pusher publishes here
	rtpPort    int // first of the relay's UDP ports
	// stale is set when the pusher died without a TEARDOWN: the relay
	// keeps the dead stream mounted and refuses a new ANNOUNCE on its path
	// (403), so the relay must be restarted before the next push.
	stale  bool
	relay  *exec.Cmd
	pusher *exec.Cmd
	closed bool
}

// Start runs the relay on free loopback ports and a pusher looping clip at
// its own frame rate as stream name, and waits until the stream can be
// described. It fails the test if rtsp-server-perl's module or ffmpeg is
// missing (deploy/setup installs both).
func Start(t testing.TB, clip, name string) *Server {
	t.Helper()
	if _, err := exec.LookPath("ffmpeg"); err != nil {
		t.Fatalf("rtsptest: ffmpeg not found (run deploy/setup): %v", err)
	}
	if _, err := exec.LookPath("perl"); err != nil {
		t.Fatalf("rtsptest: perl not found (run deploy/setup): %v", err)
	}
	s := &Server{clip: clip, name: name, dir: t.TempDir()}
	t.Cleanup(s.Close)
	var err error
	if s.clientPort, err = freeTCPPort(); err != nil {
		t.Fatalf("rtsptest: %v", err)
	}
	if s.sourcePort, err = freeTCPPort(); err != nil {
		t.Fatalf("rtsptest: %v", err)
	}
	if s.rtpPort, err = freeUDPRange(16); err != nil {
		t.Fatalf("rtsptest: %v", err)
	}
	if err := s.startRelay(); err != nil {
		t.Fatalf("rtsptest: %v", err)
	}
	if err := s.StartPusher(); err != nil {
		t.Fatalf("rtsptest: %v", err)
	}
	return s
}

// startRelay starts the relay on the server's ports and waits until it
// listens.
func (s *Server) startRelay() error {
	s.relay = exec.Command("perl", "-e", relayScript, "--", fmt.Sprint(s.rtpPort),
		"--clientport", fmt.Sprint(s.clientPort), "--serverport", fmt.Sprint(s.sourcePort),
		"--client_listen_address", "127.0.0.1", "--source_listen_address", "127.0.0.1",
		"--rtp_start_port", fmt.Sprint(s.rtpPort), "--loglevel", "2")
	if err := s.start(s.relay, "relay.log"); err != nil {
		s.relay = nil
		return fmt.Errorf("start relay: %w", err)
	}
	for _, port := range []int{s.clientPort, s.sourcePort} {
		if err := waitTCP(fmt.Sprintf("127.0.0.1:%d", port), 10*time.Second); err != nil {
			return fmt.Errorf("relay did not listen on %d: %w\n%s", port, err, s.logTail("relay.log"))
		}
	}
	return nil
}

// URL is the stream address for readers (RTP over UDP).
func (s *Server) URL() string {
	return fmt.Sprintf("rtsp://127.0.0.1:%d/%s", s.clientPort, s.name)
}

// StartPusher starts ffmpeg publishing the clip (again) and waits until the
// relay serves the stream. It is an error while a pusher runs.
func (s *Server) StartPusher() error {
	if s.pusher != nil {
		return errors.New("start pusher: a pusher is already running")
	}
	if s.stale {
		killGroup(s.relay)
		s.relay = nil
		if err := s.startRelay(); err != nil {
			return fmt.Errorf("start pusher: %w", err)
		}
		s.stale = false
	}
	// mpeg4 with a key frame every 10 frames, so that a reader joining or
	// rejoining decodes within about a second of a 10 fps clip.
	s.pusher = exec.Command("ffmpeg", "-nostdin", "-loglevel", "error", "-re", "-stream_loop", "-1", "-i", s.clip,
		"-an", "-c:v", "mpeg4", "-q:v", "4", "-g", "10",
		"-f", "rtsp", "-rtsp_transport", "udp", fmt.Sprintf("rtsp://127.0.0.1:%d/%s", s.sourcePort, s.name))
	if err := s.start(s.pusher, "pusher.log"); err != nil {
		s.pusher = nil
		return fmt.Errorf("start pusher: %w", err)
	}
	if err := s.waitStream(15 * time.Second); err != nil {
		return fmt.Errorf("start pusher: %w\n%s\n%s", err, s.logTail("pusher.log"), s.logTail("relay.log"))
	}
	return nil
}

// KillPusher kills the pusher at once (SIGKILL), as a camera losing power:
// the stream stops with no goodbye. Readers see no more frames; the relay
// keeps their sessions. StartPusher brings the stream back (restarting the
// relay on the same ports, which cannot take a new push on a path whose
// source vanished).
func (s *Server) KillPusher() error {
	if s.pusher == nil {
		return errors.New("kill pusher: no pusher running")
	}
	killGroup(s.pusher)
	s.pusher = nil
	s.stale = true
	return nil
}

// Close kills the pusher and the relay and waits for them. Safe to call
// twice.
func (s *Server) Close() {
	if s.closed {
		return
	}
	s.closed = true
	if s.pusher != nil {
		killGroup(s.pusher)
		s.pusher = nil
	}
	if s.relay != nil {
		killGroup(s.relay)
		s.relay = nil
	}
}

func (s *Server) start(cmd *exec.Cmd, logName string) error {
	f, err := os.OpenFile(filepath.Join(s.dir, logName), os.O_CREATE|os.O_WRONLY|os.O_APPEND, 0o644)
	if err != nil {
		return err
	}
	cmd.Stdout, cmd.Stderr = f, f
	// Own process group, so that killGroup reaches any grandchild too; and
	// killed with the test process if that dies first (Linux).
	cmd.SysProcAttr = &syscall.SysProcAttr{Setpgid: true, Pdeathsig: syscall.SIGKILL}
	err = cmd.Start()
	f.Close() // the child holds its own copy
	return err
}

func killGroup(cmd *exec.Cmd) {
	if cmd.Process == nil {
		return
	}
	syscall.Kill(-cmd.Process.Pid, syscall.SIGKILL)
	cmd.Wait()
}

func (s *Server) logTail(name string) string {
	b, err := os.ReadFile(filepath.Join(s.dir, name))
	if err != nil {
		return name + ": " + err.Error()
	}
	if len(b) > 2000 {
		b = b[len(b)-2000:]
	}
	return name + ":\n" + string(b)
}

// waitStream asks the relay to DESCRIBE the stream until it answers 200.
func (s *Server) waitStream(limit time.Duration) error {
	deadline := time.Now().Add(limit)
	var last error
	for time.Now().Before(deadline) {
		if last = s.describe(); last == nil {
			return nil
		}
		time.Sleep(100 * time.Millisecond)
	}
	return fmt.Errorf("stream %s not served within %v: %v", s.URL(), limit, last)
}

func (s *Server) describe() error {
	c, err := net.DialTimeout("tcp", fmt.Sprintf("127.0.0.1:%d", s.clientPort), time.Second)
	if err != nil {
		return err
	}
	defer c.Close()
	c.SetDeadline(time.Now().Add(2 * time.Second))
	r := bufio.NewReader(c)
	if _, err := fmt.Fprintf(c, "DESCRIBE %s RTSP/1.0\r\nCSeq: 1\r\nAccept: application/sdp\r\n\r\n", s.URL()); err != nil {
		return err
	}
	head, err := readReply(r)
	if err != nil {
		return fmt.Errorf("describe: %w", err)
	}
	n, _ := strconv.Atoi(head["content-length"])
	body := make([]byte, n)
	if _, err := io.ReadFull(r, body); err != nil {
		return fmt.Errorf("describe: %w", err)
	}
	// The relay answers DESCRIBE as soon as a pusher announces the stream,
	// and may refuse a reader's SETUP (404) until the pusher has set up
	// its track: the stream is served once a SETUP of the track succeeds.
	track := s.URL()
	for _, line := range strings.Split(string(body), "\n") {
		if ctl, ok := strings.CutPrefix(strings.TrimSpace(line), "a=control:"); ok && ctl != "*" {
			if strings.Contains(ctl, "://") {
				track = ctl
			} else {
				track = s.URL() + "/" + ctl
			}
		}
	}
	if _, err := fmt.Fprintf(c, "SETUP %s RTSP/1.0\r\nCSeq: 2\r\nTransport: RTP/AVP;unicast;client_port=%d-%d\r\n\r\n", track, s.rtpPort-2, s.rtpPort-1); err != nil {
		return err
	}
	head, err = readReply(r)
	if err != nil {
		return fmt.Errorf("setup %s: %w", track, err)
	}
	if sess := strings.SplitN(head["session"], ";", 2)[0]; sess != "" {
		fmt.Fprintf(c, "TEARDOWN %s RTSP/1.0\r\nCSeq: 3\r\nSession: %s\r\n\r\n", s.URL(), sess)
	}
	return nil
}

// readReply reads an RTSP reply's status line and headers (names in lower
// case); a status other than 200 is an error.
func readReply(r *bufio.Reader) (map[string]string, error) {
	status, err := r.ReadString('\n')
	if err != nil {
		return nil, err
	}
	head := map[string]string{}
	for {
		line, err := r.ReadString('\n')
		if err != nil {
			return nil, err
		}
		line = strings.TrimSpace(line)
		if line == "" {
			break
		}
		if k, v, ok := strings.Cut(line, ":"); ok {
			head[strings.ToLower(strings.TrimSpace(k))] = strings.TrimSpace(v)
		}
	}
	if !strings.Contains(status, " 200 ") {
		return head, fmt.Errorf("%s", strings.TrimSpace(status))
	}
	return head, nil
}

func freeTCPPort() (int, error) {
	l, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		return 0, fmt.Errorf("free tcp port: %w", err)
	}
	defer l.Close()
	return l.Addr().(*net.TCPAddr).Port, nil
}

// freeUDPRange finds n consecutive free UDP ports on loopback starting at
// an even port.
func freeUDPRange(n int) (int, error) {
	rng := rand.New(rand.NewSource(time.Now().UnixNano()))
	for try := 0; try < 50; try++ {
		base := 30000 + 2*rng.Intn(15000)
		var held []net.PacketConn
		ok := true
		for p := base; p < base+n; p++ {
			c, err := net.ListenPacket("udp4", fmt.Sprintf("127.0.0.1:%d", p))
			if err != nil {
				ok = false
				break
			}
			held = append(held, c)
		}
		for _, c := range held {
			c.Close()
		}
		if ok {
			return base, nil
		}
	}
	return 0, errors.New("no free range of UDP ports on 127.0.0.1")
}

func waitTCP(addr string, limit time.Duration) error {
	deadline := time.Now().Add(limit)
	for {
		c, err := net.DialTimeout("tcp", addr, 500*time.Millisecond)
		if err == nil {
			c.Close()
			return nil
		}
		if time.Now().After(deadline) {
			return err
		}
		time.Sleep(50 * time.Millisecond)
	}
}
