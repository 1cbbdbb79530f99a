package server

import (
	"encoding/binary"
	"net/http"
	"testing"
	"time"

	"github.com/gorilla/websocket"
)

// TestHeatImages: a viewer that asks for heat gets kind-3 messages
// (DEVELOPERS.md protocol) sized to the stream grid, with a hot cell where
// the planted change is.
func TestHeatImages(t *testing.T) {
	ts := mustServer(t, Options{})
	files := synthFrames(t, 32, 24, 400, [][2]int{{210, 400}})
	cr := ts.mustUpload(t, files, `{"budget":"10%","top_r":4,"arl0":300,"reference_frames":200,"seed":7,"limit":32.5,"pace":30}`)
	conn, _, err := dialWS(t, ts, cr.ID, cr.ShareToken, http.Header{"Origin": {ts.ts.URL}})
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close()
	if err := conn.WriteJSON(map[string]any{"type": "heat", "on": true}); err != nil {
		t.Fatal(err)
	}
	conn.SetReadDeadline(time.Now().Add(90 * time.Second))
	for {
		kind, msg, err := conn.ReadMessage()
		if err != nil {
			t.Fatalf("no heat image with a hot cell arrived: %v", err)
		}
		if kind != websocket.BinaryMessage || msg[0] != msgHeat {
			continue
		}
		w, h := int(binary.LittleEndian.Uint16(msg[8:])), int(binary.LittleEndian.Uint16(msg[10:]))
		if w != 32 || h != 24 || len(msg) != 12+w*h {
			t.Fatalf("heat image %dx%d in %d bytes, want 32x24 in %d", w, h, len(msg), 12+32*24)
		}
		frame := binary.LittleEndian.Uint32(msg[4:])
		hot := 0
		for _, v := range msg[12:] {
			if v == 255 {
				hot++
			}
		}
		if frame > 260 && hot > 0 {
			return // a stream at or above the limit during the change
		}
	}
}
