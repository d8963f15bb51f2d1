package bus

import (
	"bytes"
	"encoding/json"
	"fmt"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"stillwater/alert"
)

var outboxNow = time.Date(2026, 12, 2, 12, 0, 0, 0, time.UTC)

// TestOutboxRecordValidation reads an outbox log of one good record and
// one bad line per case: the bad line is set aside with a reason naming
// what is wrong, the good record is kept.
func TestOutboxRecordValidation(t *testing.T) {
	payload := []byte(`{"v":1,"kind":"target","camera":"north"}`)
	rec := func(edit func(*outboxRecord)) string {
		r := outboxRecord{N: 7, ID: "north-7", Subject: "sw.north.target", Kind: alert.KindTarget, Queued: outboxNow, Data: payload}
		edit(&r)
		b, err := json.Marshal(r)
		require.NoError(t, err)
		return string(b)
	}
	cases := []struct {
		name, line, want string
	}{
		{"empty subject", rec(func(r *outboxRecord) { r.Subject = "" }), "empty subject"},
		{"short subject", rec(func(r *outboxRecord) { r.Subject = "sw" }), "three tokens"},
		{"wildcard", rec(func(r *outboxRecord) { r.Subject = "sw.*.target" }), "token"},
		{"kind differs from subject", rec(func(r *outboxRecord) { r.Kind = alert.KindFault }), "does not end in its kind"},
		{"heartbeat kind", rec(func(r *outboxRecord) { r.Kind, r.Subject = alert.KindBeat, "sw.north.heartbeat" }), `kind "heartbeat"`},
		{"no id", rec(func(r *outboxRecord) { r.ID = "" }), "empty id"},
		{"long id", rec(func(r *outboxRecord) { r.ID = strings.Repeat("x", maxIDLen+1) }), "id of 513 bytes"},
		{"control character in id", rec(func(r *outboxRecord) { r.ID = "a\r\nb" }), "control characters"},
		{"no number", rec(func(r *outboxRecord) { r.N = 0 }), "no record number"},
		{"payload not JSON", rec(func(r *outboxRecord) { r.Data = []byte("not json") }), "not JSON"},
		{"payload not an object", rec(func(r *outboxRecord) { r.Data = []byte(`[1,2]`) }), "not a JSON object"},
		{"payload too big", rec(func(r *outboxRecord) { r.Data = []byte(`{"x":"` + strings.Repeat("a", 2000) + `"}`) }), "over the outbox bound"},
		{"both message and tombstone", `{"n":7,"done":7,"id":"a","subj":"sw.north.target","kind":"target"}`, "both"},
		{"not JSON", `{"n":7,`, "not a JSON record"},
		{"wrong types", `{"n":"seven"}`, "not a JSON record"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			dir := t.TempDir()
			good := rec(func(r *outboxRecord) { r.N, r.ID = 8, "north-8" })
			writeOutboxLog(t, dir, c.line, good)
			ob, err := openOutbox(OutboxConfig{Dir: dir, MaxBytes: 1024})
			require.NoError(t, err)
			defer ob.close()
			require.Len(t, ob.live, 1, "the valid record is kept")
			assert.Equal(t, "north-8", ob.live[0].ID)
			require.Len(t, ob.rejected, 1)
			assert.Equal(t, 1, ob.rejected[0].Line)
			assert.Contains(t, ob.rejected[0].Reason, c.want)

			// The line is kept as it was in outbox.log.rejected, and the
			// rewritten log holds the valid record only.
			b, err := os.ReadFile(filepath.Join(dir, "outbox.log.rejected"))
			require.NoError(t, err)
			var saved rejectedLine
			require.NoError(t, json.Unmarshal(bytes.TrimSpace(b), &saved))
			assert.Equal(t, c.line, saved.Raw)
			b, err = os.ReadFile(filepath.Join(dir, "outbox.log"))
			require.NoError(t, err)
			assert.Equal(t, 1, bytes.Count(b, []byte("\n")))
			assert.Contains(t, string(b), `"id":"north-8"`)
		})
	}
}

// TestRejectedLinesAccumulate opens an outbox twice with a bad line
// appended each time: the rejected file keeps both.
func TestRejectedLinesAccumulate(t *testing.T) {
	dir := t.TempDir()
	for i, line := range []string{`{"n":1}`, `garbage`} {
		f, err := os.OpenFile(filepath.Join(dir, "outbox.log"), os.O_CREATE|os.O_APPEND|os.O_WRONLY, 0o640)
		require.NoError(t, err)
		_, err = f.WriteString(line + "\n")
		require.NoError(t, err)
		require.NoError(t, f.Close())
		ob, err := openOutbox(OutboxConfig{Dir: dir})
		require.NoError(t, err)
		require.NoError(t, ob.close())
		b, err := os.ReadFile(filepath.Join(dir, "outbox.log.rejected"))
		require.NoError(t, err)
		assert.Equal(t, i+1, bytes.Count(b, []byte("\n")))
	}
}

// FuzzParseOutbox reads arbitrary bytes as an outbox log. It must never
// panic; every record it keeps must pass validation and give a camera
// token; every non-blank line must be kept, a tombstone, or set aside
// with a reason and its original bytes; and the log rewritten from what
// was kept must read back the same with nothing set aside.
func FuzzParseOutbox(f *testing.F) {
	f.Add([]byte(`{"n":1,"id":"a","subj":"sw.north.target","kind":"target","data":"e30="}` + "\n"))
	f.Add([]byte(`{"n":1,"id":"a","subj":"","kind":"target","data":"e30="}` + "\n"))
	f.Fuzz(func(t *testing.T, data []byte) {
		const maxBytes = 1 << 12
		live, rejected, next := parseOutbox(data, maxBytes, outboxNow)
		seen := map[uint64]bool{}
		for _, r := range live {
			if err := r.validate(maxBytes); err != nil {
				t.Fatalf("kept an invalid record %+v: %v", r, err)
			}
			if err := alert.ValidToken(cameraOf(r.Subject)); err != nil {
				t.Fatalf("kept subject %q: camera %v", r.Subject, err)
			}
			if seen[r.N] || r.N >= next {
				t.Fatalf("record number %d repeated or not below next %d", r.N, next)
			}
			seen[r.N] = true
			if r.Queued.IsZero() {
				t.Fatalf("record %d kept without a queue time", r.N)
			}
		}
		lines := bytes.Split(data, []byte("\n"))
		byLine := map[int]rejectedLine{}
		for _, r := range rejected {
			if r.Line < 1 || r.Line > len(lines) || r.Reason == "" {
				t.Fatalf("rejected line %+v out of range or without a reason", r)
			}
			raw := []byte(r.Raw)
			if r.RawB64 != nil {
				raw = r.RawB64
			}
			if !bytes.Equal(raw, lines[r.Line-1]) {
				t.Fatalf("line %d set aside as %q, was %q", r.Line, raw, lines[r.Line-1])
			}
			byLine[r.Line] = r
		}
		for i, line := range lines {
			if len(bytes.TrimSpace(line)) == 0 {
				continue
			}
			if _, ok := byLine[i+1]; ok {
				continue
			}
			var r outboxRecord
			if err := json.Unmarshal(line, &r); err != nil {
				t.Fatalf("line %d neither kept nor set aside: %v", i+1, err)
			}
			if r.Done == 0 && r.Drop == 0 && r.validate(maxBytes) != nil {
				t.Fatalf("invalid line %d not set aside", i+1)
			}
		}
		var buf bytes.Buffer
		for _, r := range live {
			b, err := json.Marshal(r)
			if err != nil {
				t.Fatalf("encode kept record: %v", err)
			}
			buf.Write(b)
			buf.WriteByte('\n')
		}
		again, rej, _ := parseOutbox(buf.Bytes(), maxBytes, outboxNow)
		if len(rej) > 0 {
			t.Fatalf("rewritten log has invalid lines: %+v", rej)
		}
		if len(again) != len(live) {
			t.Fatalf("rewritten log holds %d records, not %d", len(again), len(live))
		}
		for i := range live {
			a, b := live[i], again[i]
			if a.N != b.N || a.ID != b.ID || a.Subject != b.Subject || a.Kind != b.Kind || a.Low != b.Low ||
				!a.Queued.Equal(b.Queued) || !bytes.Equal(a.Data, b.Data) {
				t.Fatalf("record %d changed in the round trip: %+v became %+v", i, a, b)
			}
		}
	})
}

// TestDeadLetterFileBounded: with a bound of 1 000 bytes, letters of about
// 200 bytes fill the file, the next one moves it aside to .1 and starts a
// fresh one; a second rotation replaces the .1. Every letter written is
// counted, the newest always kept, and neither file passes the bound.
func TestDeadLetterFileBounded(t *testing.T) {
	dir := t.TempDir()
	const bound = 1000
	ob, err := openOutbox(OutboxConfig{Dir: dir, DeadLetterMaxBytes: bound})
	require.NoError(t, err)
	defer ob.close()
	path := filepath.Join(dir, DeadLetterFile)
	payload := `{"pad":"` + strings.Repeat("x", 60) + `"}`
	var ids []string
	rotations := 0
	for i := 0; i < 12; i++ {
		id := fmt.Sprintf("msg-%02d", i)
		ids = append(ids, id)
		rotated, err := ob.writeDeadLetter(outboxRecord{N: uint64(i + 1), ID: id, Subject: "sw.north.target", Kind: "target", Data: []byte(payload), Queued: outboxNow}, "refused", 1, outboxNow)
		require.NoError(t, err)
		if rotated {
			rotations++
		}
		for _, p := range []string{path, path + ".1"} {
			if st, err := os.Stat(p); err == nil {
				assert.LessOrEqual(t, st.Size(), int64(bound), "%s after letter %d", filepath.Base(p), i)
			}
		}
		cur := readDeadLetters(t, path)
		require.NotEmpty(t, cur)
		assert.Equal(t, id, cur[len(cur)-1].ID, "the newest letter is in the current file")
	}
	assert.GreaterOrEqual(t, rotations, 2, "12 letters of about 200 bytes make at least two rotations")
	assert.Equal(t, uint64(12), ob.stats().deadLettered)
	// The current file and the one moved aside hold the newest letters,
	// in order, with none missing between them.
	var kept []string
	for _, d := range append(readDeadLetters(t, path+".1"), readDeadLetters(t, path)...) {
		kept = append(kept, d.ID)
	}
	assert.Equal(t, ids[len(ids)-len(kept):], kept)
}
