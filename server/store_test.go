package server

import (
	"archive/zip"
	"bytes"
	"encoding/binary"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/gorilla/websocket"
)

// TestTornLogsRepaired: a crash can leave half a line at the end of
// stats.csv or alarms.jsonl; reading drops it and truncates the file so
// appending goes on cleanly.
func TestTornLogsRepaired(t *testing.T) {
	dir := t.TempDir()
	st, err := openStatsLog(dir)
	if err != nil {
		t.Fatal(err)
	}
	for f := 0; f < 3; f++ {
		st.append(statsRow{Frame: f, G: float64(f) / 2, Limit: 9, PixelsRead: 7})
	}
	st.f.WriteString("3,1.5,9") // torn
	st.close()
	rows, err := readStats(dir)
	if err != nil || len(rows) != 3 || rows[2] != (statsRow{2, 1, 9, 7}) {
		t.Fatalf("rows %+v err %v", rows, err)
	}
	data, _ := os.ReadFile(filepath.Join(dir, statsFileName))
	if !strings.HasSuffix(string(data), "2,1,9,7\n") || !strings.HasPrefix(string(data), statsHeader) {
		t.Fatalf("stats.csv after repair: %q", data)
	}

	al, err := openAlarmLog(dir)
	if err != nil {
		t.Fatal(err)
	}
	al.append(alarmEvent{Event: "start", Alarm: reportAlarm{Frame: 5, EndFrame: -1}})
	al.f.WriteString(`{"event":"end","ala`)
	al.close()
	evs, err := readAlarmEvents(dir)
	if err != nil || len(evs) != 1 || evs[0].Alarm.Frame != 5 {
		t.Fatalf("events %+v err %v", evs, err)
	}
	al, _ = openAlarmLog(dir)
	al.append(alarmEvent{Event: "end", Alarm: reportAlarm{Frame: 5, EndFrame: 9}})
	al.close()
	if evs, _ = readAlarmEvents(dir); len(evs) != 2 || evs[1].Alarm.EndFrame != 9 {
		t.Fatalf("after appending to the repaired log: %+v", evs)
	}
}

// TestZipUploadRefusesEscapes: a .zip whose entry climbs out of its
// folder gets that entry listed as an error; the other frames are reviewed.
func TestZipUploadRefusesEscapes(t *testing.T) {
	var buf bytes.Buffer
	zw := zip.NewWriter(&buf)
	for i, f := range synthFrames(t, 16, 12, 70, nil) {
		name := "clip/" + f.name
		if i == 65 {
			name = "../" + f.name
		}
		w, _ := zw.Create(name)
		w.Write(f.data)
	}
	zw.Close()
	ts := mustServer(t, Options{})
	cr := ts.mustUpload(t, []upFile{{"clip.zip", buf.Bytes()}}, `{"budget":"20%","top_r":2,"reference_frames":50,"limit":50,"pace":0}`)
	rep := waitReport(t, ts.Server, cr.ID)
	if rep.Frames != 69 || len(rep.Errors) != 1 || !strings.Contains(rep.Errors[0].File, "..") {
		t.Fatalf("frames %d, errors %+v; want 69 frames and the escaping entry listed", rep.Frames, rep.Errors)
	}
}

// TestSeekSendsPreview: the owner's seek message brings a preview of that
// frame; a share viewer's seek is ignored.
func TestSeekSendsPreview(t *testing.T) {
	ts := mustServer(t, Options{})
	cr := ts.mustUpload(t, synthFrames(t, 16, 12, 60, nil), `{"budget":"20%","top_r":2,"reference_frames":50,"limit":50,"pace":0}`)
	waitReport(t, ts.Server, cr.ID)
	for _, c := range []struct {
		tok  string
		want bool
	}{{cr.ShareToken, false}, {cr.OwnerToken, true}} {
		conn, _, err := dialWS(t, ts, cr.ID, c.tok, nil)
		if err != nil {
			t.Fatal(err)
		}
		conn.ReadMessage() // hello
		conn.WriteMessage(websocket.TextMessage, []byte(`{"type":"seek","frame":7}`))
		conn.SetReadDeadline(time.Now().Add(2 * time.Second))
		got := false
		for {
			kind, msg, err := conn.ReadMessage()
			if err != nil {
				break
			}
			if kind == websocket.BinaryMessage && msg[0] == msgPreview && binary.LittleEndian.Uint32(msg[4:]) == 7 {
				got = true
				break
			}
		}
		conn.Close()
		if got != c.want {
			t.Fatalf("seek with the %s token: preview %v, want %v", map[bool]string{true: "owner", false: "share"}[c.want], got, c.want)
		}
	}
}

// TestFrameOverPixelLimit: frames over MaxPixels are refused one by one
// (listed with the reason); with no good frame left the session fails with
// a message that says so.
func TestFrameOverPixelLimit(t *testing.T) {
	ts := mustServer(t, Options{MaxPixels: 100})
	cr := ts.mustUpload(t, synthFrames(t, 16, 12, 5, nil), `{"reference_frames":2,"limit":5,"pace":0}`)
	sess, _ := ts.session(cr.ID)
	var st Status
	waitFor(t, "the session to fail", 20*time.Second, func() bool {
		st = sess.Status()
		return st.State == StateFailed
	})
	if len(st.Errors) != 5 || !strings.Contains(st.Errors[0].Message, "100") || st.Message == "" || st.Message == "review failed" {
		t.Fatalf("errors %+v, message %q", st.Errors, st.Message)
	}
}

// TestParamsChangeKeepsOldRun: a parameter change restarts the review and
// moves the finished run's logs to runs/0/ instead of losing them.
func TestParamsChangeKeepsOldRun(t *testing.T) {
	ts := mustServer(t, Options{})
	cr := ts.mustUpload(t, synthFrames(t, 16, 12, 70, [][2]int{{55, 70}}), `{"budget":"20%","top_r":2,"reference_frames":50,"limit":8,"pace":0}`)
	first := waitReport(t, ts.Server, cr.ID)
	if len(first.Alarms) == 0 {
		t.Fatal("the first run should alarm at limit 8")
	}
	code, b := ts.do(t, "PATCH", "/api/sessions/"+cr.ID+"/params", cr.OwnerToken, "application/json", strings.NewReader(`{"limit":1e6}`))
	if code != 200 {
		t.Fatalf("PATCH: %d %s", code, b)
	}
	second := waitReport(t, ts.Server, cr.ID)
	if len(second.Alarms) != 0 || second.ControlLimit != 1e6 {
		t.Fatalf("second run: limit %v, %d alarms", second.ControlLimit, len(second.Alarms))
	}
	sess, _ := ts.session(cr.ID)
	old, err := readAlarmEvents(filepath.Join(sess.dir, "runs", "0"))
	if err != nil || len(old) == 0 || old[0].Alarm.Frame != first.Alarms[0].Frame {
		t.Fatalf("first run's alarms in runs/0: %+v (%v)", old, err)
	}
	if cur, _ := readAlarmEvents(sess.dir); len(cur) != 0 {
		t.Fatalf("current alarms.jsonl holds %d events of the old run", len(cur))
	}
}

// TestFinishedSessionGreets: a viewer that connects after the review ended
// still gets the last frame's numbers (state finished) and its preview.
func TestFinishedSessionGreets(t *testing.T) {
	ts := mustServer(t, Options{})
	cr := ts.mustUpload(t, synthFrames(t, 16, 12, 60, nil), `{"budget":"20%","top_r":2,"reference_frames":50,"limit":50,"pace":0}`)
	waitReport(t, ts.Server, cr.ID)
	conn, _, err := dialWS(t, ts, cr.ID, cr.ShareToken, nil)
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close()
	conn.SetReadDeadline(time.Now().Add(5 * time.Second))
	var frame, preview bool
	for !(frame && preview) {
		kind, msg, err := conn.ReadMessage()
		if err != nil {
			t.Fatalf("frame update %v, preview %v: %v", frame, preview, err)
		}
		if kind != websocket.BinaryMessage {
			continue
		}
		switch msg[0] {
		case msgFrame:
			d := decodeFrameMsg(t, msg)
			frame = d.frame == 59 && d.state == wireFinished
		case msgPreview:
			preview = binary.LittleEndian.Uint32(msg[4:]) == 59
		}
	}
}

// TestDataDirLocked: a second server on the same data directory is refused.
func TestDataDirLocked(t *testing.T) {
	ts := mustServer(t, Options{})
	if _, err := New(Options{DataDir: ts.opt.DataDir}); err == nil || !strings.Contains(err.Error(), "in use") {
		t.Fatalf("second server on one data directory: %v", err)
	}
	ts.Close()
	s2, err := New(Options{DataDir: ts.opt.DataDir})
	if err != nil {
		t.Fatalf("after the first closed: %v", err)
	}
	s2.Close()
}
