package server

import (
	"bytes"
	"fmt"
	"image"
	"image/png"
	"math/rand/v2"
	"testing"
	"time"

	"github.com/gorilla/websocket"
)

// TestTraffic1024 reviews 1024 x 1024 frames (3% budget, every pixel a
// stream) with a websocket viewer attached and measures what one frame
// costs on the wire: the largest frame update plus the largest preview
// must stay within 64 KB.
func TestTraffic1024(t *testing.T) {
	if testing.Short() || raceEnabled {
		t.Skip("encodes 1024 x 1024 frames (too slow with -short or -race; run go test -run Traffic1024 ./server/)")
	}
	const n, ref = 14, 4
	rng := rand.New(rand.NewPCG(5, 6))
	files := make([]upFile, n)
	for i := range files {
		img := image.NewGray(image.Rect(0, 0, 1024, 1024))
		for j := range img.Pix {
			img.Pix[j] = uint8(100 + 20*rng.NormFloat64())
		}
		var buf bytes.Buffer
		png.Encode(&buf, img)
		files[i] = upFile{fmt.Sprintf("f%02d.png", i), buf.Bytes()}
	}
	ts := mustServer(t, Options{})
	cr := ts.mustUpload(t, files, fmt.Sprintf(`{"budget":"3%%","reference_frames":%d,"limit":1000,"pace":4}`, ref))
	conn, _, err := dialWS(t, ts, cr.ID, cr.ShareToken, nil)
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close()
	conn.SetReadDeadline(time.Now().Add(90 * time.Second))
	var maxFrame, maxPreview, frames int
	for frames < n-ref-1 {
		kind, msg, err := conn.ReadMessage()
		if err != nil {
			t.Fatalf("after %d frame updates: %v", frames, err)
		}
		if kind != websocket.BinaryMessage {
			continue
		}
		switch msg[0] {
		case msgFrame:
			frames++
			d := decodeFrameMsg(t, msg)
			if d.marked == 0 {
				t.Fatal("empty read mask")
			}
			maxFrame = max(maxFrame, len(msg))
		case msgPreview:
			maxPreview = max(maxPreview, len(msg))
		}
	}
	t.Logf("1024x1024, 3%% budget: largest frame update %d B, largest preview %d B, sum %d B (limit 65536)", maxFrame, maxPreview, maxFrame+maxPreview)
	if maxFrame+maxPreview > 64<<10 || maxPreview == 0 {
		t.Fatalf("frame traffic %d + %d B", maxFrame, maxPreview)
	}
}
