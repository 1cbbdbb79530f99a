package server

import (
	"encoding/binary"
	"encoding/json"
	"net/http"
	"strings"
	"testing"
	"time"

	"github.com/gorilla/websocket"
)

func dialWS(t *testing.T, ts *testServer, id, tok string, h http.Header) (*websocket.Conn, *http.Response, error) {
	t.Helper()
	u := "ws" + strings.TrimPrefix(ts.ts.URL, "http") + "/ws/sessions/" + id + "?token=" + tok
	return websocket.DefaultDialer.Dial(u, h)
}

// TestWebsocketViewers: an owner and a share viewer both get a hello with
// their role and then frame updates whose frame numbers advance; a foreign
// Origin is refused.
func TestWebsocketViewers(t *testing.T) {
	ts := mustServer(t, Options{})
	files := synthFrames(t, 32, 24, 260, [][2]int{{220, 250}})
	cr := ts.mustUpload(t, files, `{"budget":"10%","top_r":4,"arl0":300,"reference_frames":200,"seed":7,"limit":32.5,"pace":40}`)

	if _, res, err := dialWS(t, ts, cr.ID, cr.ShareToken, http.Header{"Origin": {"http://elsewhere.example"}}); err == nil || res == nil || res.StatusCode != http.StatusForbidden {
		t.Fatalf("foreign origin: err %v, response %v; want 403", err, res)
	}
	if _, res, err := dialWS(t, ts, cr.ID, "wrong", nil); err == nil || res.StatusCode != http.StatusForbidden {
		t.Fatalf("wrong token: want 403, got %v", res)
	}
	for _, c := range []struct{ tok, role string }{{cr.OwnerToken, roleOwner}, {cr.ShareToken, roleViewer}} {
		t.Run(c.role, func(t *testing.T) {
			conn, _, err := dialWS(t, ts, cr.ID, c.tok, http.Header{"Origin": {ts.ts.URL}})
			if err != nil {
				t.Fatal(err)
			}
			defer conn.Close()
			conn.SetReadDeadline(time.Now().Add(60 * time.Second))
			var hello struct {
				Type, Role string
				ShareURL   string `json:"share_url"`
			}
			if _, msg, err := conn.ReadMessage(); err != nil || json.Unmarshal(msg, &hello) != nil || hello.Type != "hello" || hello.Role != c.role {
				t.Fatalf("first message %q (%v), want hello for %s", msg, err, c.role)
			}
			if (hello.ShareURL != "") != (c.role == roleOwner) {
				t.Fatalf("share_url %q in the %s hello", hello.ShareURL, c.role)
			}
			var seen []uint32
			previews := 0
			for len(seen) < 5 {
				kind, msg, err := conn.ReadMessage()
				if err != nil {
					t.Fatal(err)
				}
				if kind != websocket.BinaryMessage {
					continue
				}
				switch msg[0] {
				case msgFrame:
					d := decodeFrameMsg(t, msg)
					if d.mw != 32 || d.mh != 24 || d.scale != 1 || d.marked != 77 {
						t.Fatalf("frame update: mask %dx%d scale %d with %d cells, want 32x24 scale 1, 77 read", d.mw, d.mh, d.scale, d.marked)
					}
					seen = append(seen, d.frame)
				case msgPreview:
					previews++
					if f := binary.LittleEndian.Uint32(msg[4:]); f < 200 {
						t.Fatalf("preview of frame %d during watching", f)
					}
				}
			}
			for i := 1; i < len(seen); i++ {
				if seen[i] <= seen[i-1] || seen[i] < 200 {
					t.Fatalf("frame numbers %v do not advance through the watched frames", seen)
				}
			}
		})
	}
}

// TestCompare runs the session's frames again for two more policies and
// gets one report and statistic series per policy; a share token cannot.
func TestCompare(t *testing.T) {
	ts := mustServer(t, Options{})
	files := synthFrames(t, 16, 12, 90, [][2]int{{70, 90}})
	cr := ts.mustUpload(t, files, `{"budget":"20%","top_r":2,"reference_frames":60,"limit":20,"pace":0}`)
	body := `{"policies":["random","full","random"]}`
	if code, _ := ts.do(t, "POST", "/api/sessions/"+cr.ID+"/compare", cr.ShareToken, "application/json", strings.NewReader(body)); code != http.StatusForbidden {
		t.Fatalf("compare with the share token: %d, want 403", code)
	}
	code, b := ts.do(t, "POST", "/api/sessions/"+cr.ID+"/compare", cr.OwnerToken, "application/json", strings.NewReader(body))
	if code != http.StatusOK {
		t.Fatalf("compare: %d %s", code, b)
	}
	var res struct{ Runs []compareRun }
	if err := json.Unmarshal(b, &res); err != nil {
		t.Fatal(err)
	}
	want := []string{"adaptive", "random", "full"}
	if len(res.Runs) != len(want) {
		t.Fatalf("%d runs, want %v", len(res.Runs), want)
	}
	for i, r := range res.Runs {
		if r.Policy != want[i] || r.Report.Policy != want[i] || r.Report.Frames != 90 || len(r.G) != 30 || r.Frame[0] != 60 {
			t.Fatalf("run %d: policy %s/%s, %d frames, %d points from %v", i, r.Policy, r.Report.Policy, r.Report.Frames, len(r.G), r.Frame[:1])
		}
	}
	if res.Runs[2].Report.WatchPixelsRead != 30*16*12 {
		t.Fatalf("full policy read %d pixels over 30 frames, want every pixel", res.Runs[2].Report.WatchPixelsRead)
	}
}
