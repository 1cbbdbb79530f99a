package server

import (
	"bufio"
	"context"
	"encoding/json"
	"fmt"
	"net/http"
	"os"
	"os/exec"
	"path/filepath"
	"reflect"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"
)

// restartParams are small enough for a quick review and calibration.
const restartParams = `{"budget":"10%","top_r":4,"arl0":300,"reference_frames":200,"seed":7,"paths":50`

var (
	binOnce sync.Once
	binPath string
	binErr  error
)

// mustBinary builds the sparsewatch command once per test run.
func mustBinary(t *testing.T) string {
	t.Helper()
	binOnce.Do(func() {
		dir, err := os.MkdirTemp("", "sparsewatch-bin-")
		if err != nil {
			binErr = err
			return
		}
		binPath = filepath.Join(dir, "sparsewatch")
		if out, err := exec.Command("go", "build", "-o", binPath, "sparsewatch").CombinedOutput(); err != nil {
			binErr = fmt.Errorf("go build: %v\n%s", err, out)
		}
	})
	if binErr != nil {
		t.Fatal(binErr)
	}
	return binPath
}

// child is a `sparsewatch serve` process.
type child struct {
	cmd *exec.Cmd
	url string
}

func startChild(t *testing.T, bin, data string) *child {
	t.Helper()
	cmd := exec.Command(bin, "serve", "--addr", "127.0.0.1:0", "--data", data)
	out, err := cmd.StdoutPipe()
	if err != nil {
		t.Fatal(err)
	}
	if testing.Verbose() {
		cmd.Stderr = os.Stderr
	}
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	urlc := make(chan string, 1)
	go func() {
		sc := bufio.NewScanner(out)
		for sc.Scan() {
			if _, rest, ok := strings.Cut(sc.Text(), "serving "); ok {
				urlc <- strings.Fields(rest)[0]
			}
		}
	}()
	select {
	case u := <-urlc:
		return &child{cmd: cmd, url: u}
	case <-time.After(30 * time.Second):
		cmd.Process.Kill()
		t.Fatal("child did not print its address")
	}
	return nil
}

func (c *child) getJSON(t *testing.T, path, tok string, v any) int {
	t.Helper()
	req, _ := http.NewRequest("GET", c.url+path, nil)
	if tok != "" {
		req.Header.Set("Authorization", "Bearer "+tok)
	}
	res, err := http.DefaultClient.Do(req)
	if err != nil {
		t.Fatal(err)
	}
	defer res.Body.Close()
	if v != nil {
		json.NewDecoder(res.Body).Decode(v)
	}
	return res.StatusCode
}

func waitFor(t *testing.T, what string, limit time.Duration, ok func() bool) {
	t.Helper()
	deadline := time.Now().Add(limit)
	for !ok() {
		if time.Now().After(deadline) {
			t.Fatalf("timed out waiting for %s", what)
		}
		time.Sleep(50 * time.Millisecond)
	}
}

// TestRestartResumesReview kills the server binary with SIGKILL in the
// middle of a paced review, starts it again on the same data directory and
// checks: the session is listed, every alarm logged before the kill is
// still there, no alarm event is logged twice, and the resumed review ends
// with the same report as an uninterrupted run of the same frames.
func TestRestartResumesReview(t *testing.T) {
	if testing.Short() {
		t.Skip("builds the binary and runs two processes")
	}
	bin := mustBinary(t)
	frames := synthFrames(t, 32, 24, 400, [][2]int{{240, 270}, {330, 360}})

	// Reference: the same frames and params, uninterrupted, in process.
	ref := mustServer(t, Options{})
	rc := ref.mustUpload(t, frames, restartParams+`,"pace":0}`)
	want := waitReport(t, ref.Server, rc.ID)
	if len(want.Alarms) < 1 || want.Alarms[0].Frame < 240 {
		t.Fatalf("reference run: alarms %+v, want one at the change from frame 240", want.Alarms)
	}

	data := t.TempDir()
	c1 := startChild(t, bin, data)
	body, ct := multipartBody(t, frames, restartParams+`,"pace":60}`)
	res, err := http.Post(c1.url+"/api/sessions", ct, body)
	if err != nil {
		t.Fatal(err)
	}
	var cr createdResponse
	json.NewDecoder(res.Body).Decode(&cr)
	res.Body.Close()
	if res.StatusCode != http.StatusCreated {
		t.Fatalf("upload to child: %d", res.StatusCode)
	}
	// Kill once the first alarm is logged, mid-review.
	waitFor(t, "frame 290 in the child", 60*time.Second, func() bool {
		var st Status
		c1.getJSON(t, "/api/sessions/"+cr.ID, cr.OwnerToken, &st)
		return st.Frame >= 290
	})
	c1.cmd.Process.Signal(syscall.SIGKILL)
	c1.cmd.Wait()
	sessDir := filepath.Join(data, "sessions", cr.ID)
	before, err := readAlarmEvents(sessDir)
	if err != nil || len(before) < 1 {
		t.Fatalf("alarm events logged before the kill: %d (%v), want the first alarm's start", len(before), err)
	}
	rowsBefore, _ := readStats(sessDir)
	if len(rowsBefore) == 0 || rowsBefore[len(rowsBefore)-1].Frame >= 399 {
		t.Fatalf("the review was not interrupted mid-way: %d stats rows", len(rowsBefore))
	}
	t.Logf("killed after frame %d with %d alarm events logged", rowsBefore[len(rowsBefore)-1].Frame, len(before))

	c2 := startChild(t, bin, data)
	defer func() { c2.cmd.Process.Kill(); c2.cmd.Wait() }()
	var list struct{ Sessions []Status }
	c2.getJSON(t, "/api/sessions", "", &list)
	if len(list.Sessions) != 1 || list.Sessions[0].ID != cr.ID {
		t.Fatalf("after restart the list is %+v, want session %s", list.Sessions, cr.ID)
	}
	var st Status
	waitFor(t, "the resumed review to finish", 90*time.Second, func() bool {
		c2.getJSON(t, "/api/sessions/"+cr.ID, cr.OwnerToken, &st)
		return st.State == StateFinished || st.State == StateFailed
	})
	var got Report
	c2.getJSON(t, "/api/sessions/"+cr.ID+"/report", cr.ShareToken, &got)
	if !reflect.DeepEqual(got.Alarms, want.Alarms) {
		t.Fatalf("resumed alarms differ from an uninterrupted run:\n got %+v\nwant %+v", got.Alarms, want.Alarms)
	}
	after, _ := readAlarmEvents(sessDir)
	seen := map[string]bool{}
	for _, ev := range after {
		k := ev.Event + ":" + strconv.Itoa(ev.Alarm.Frame)
		if seen[k] {
			t.Fatalf("alarm event %s at frame %d logged twice", ev.Event, ev.Alarm.Frame)
		}
		seen[k] = true
	}
	for _, ev := range before {
		if !seen[ev.Event+":"+strconv.Itoa(ev.Alarm.Frame)] {
			t.Fatalf("alarm event %s at frame %d lost after the restart", ev.Event, ev.Alarm.Frame)
		}
	}
	nwant := 0
	for _, a := range want.Alarms {
		nwant++
		if a.EndFrame >= 0 {
			nwant++
		}
	}
	if len(after) != nwant {
		t.Fatalf("%d alarm events logged, want %d (a start per alarm, an end per ended alarm)", len(after), nwant)
	}
	rows, _ := readStats(sessDir)
	t.Logf("resumed run: %d alarm events, %d stats rows (frames %d-%d), alarms %+v", len(after), len(rows), rows[0].Frame, rows[len(rows)-1].Frame, got.Alarms)
	for i := 1; i < len(rows); i++ {
		if rows[i].Frame != rows[i-1].Frame+1 {
			t.Fatalf("stats.csv frame %d follows %d", rows[i].Frame, rows[i-1].Frame)
		}
	}
}

// waitReport waits for an in-process session to finish and returns its report.
func waitReport(t *testing.T, s *Server, id string) Report {
	t.Helper()
	sess, err := s.session(id)
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithTimeout(context.Background(), 120*time.Second)
	defer cancel()
	for {
		st := sess.Status()
		if st.State == StateFinished {
			return sess.Report()
		}
		if st.State == StateFailed {
			t.Fatalf("review failed: %s (errors %v)", st.Message, st.Errors)
		}
		select {
		case <-ctx.Done():
			t.Fatalf("review did not finish: %+v", st)
		case <-time.After(20 * time.Millisecond):
		}
	}
}
