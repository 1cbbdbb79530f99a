package server

import (
	"encoding/json"
	"fmt"
	"net/http"
	"sort"
	"strings"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"github.com/gorilla/websocket"
)

// BenchmarkViewerLoad measures one session's review speed (frames per
// second of the frame loop, pace 0) with no viewers and with 20 websocket
// viewers that read everything plus one that never reads, alternating the
// two conditions eight times in one run. It reports both mean speeds, their
// ratio and the median of the back-to-back pair ratios (the target is
// >= 0.9; the pair median is the one to trust on a shared machine). Run it
// with scripts/load-viewers.
func BenchmarkViewerLoad(b *testing.B) {
	const (
		w, h, n  = 96, 96, 3000
		readers  = 20
		rounds   = 8
		paramsFn = `{"budget":"5%%","top_r":8,"limit":40,"reference_frames":100,"pace":0,"seed":%d}`
	)
	ts := mustServer(b, Options{})
	frames := synthFrames(b, w, h, n, [][2]int{{2400, 2450}})
	cr := ts.mustUpload(b, frames, fmt.Sprintf(paramsFn, 1))
	sess, _ := ts.session(cr.ID)
	waitDone := func() Status {
		for {
			st := sess.Status()
			if st.State == StateFinished || st.State == StateFailed {
				if st.State == StateFailed {
					b.Fatalf("review failed: %s", st.Message)
				}
				return st
			}
			time.Sleep(20 * time.Millisecond)
		}
	}
	waitDone()
	rerun := func(seed int) float64 {
		body := strings.NewReader(fmt.Sprintf(paramsFn, seed))
		if code, msg := ts.do(b, "PATCH", "/api/sessions/"+cr.ID+"/params", cr.OwnerToken, "application/json", body); code != 200 {
			b.Fatalf("PATCH: %d %s", code, msg)
		}
		return waitDone().FramesPerSecond
	}
	wsURL := "ws" + strings.TrimPrefix(ts.ts.URL, "http") + "/ws/sessions/" + cr.ID + "?token=" + cr.ShareToken
	for b.Loop() {
		var none, with float64
		var ratios []float64
		var got atomic.Int64
		for r := 0; r < rounds; r++ {
			alone := rerun(10 + 2*r)
			none += alone
			var conns []*websocket.Conn
			var wg sync.WaitGroup
			for i := 0; i <= readers; i++ {
				c, _, err := websocket.DefaultDialer.Dial(wsURL, http.Header{})
				if err != nil {
					b.Fatal(err)
				}
				conns = append(conns, c)
				if i == readers {
					continue // the viewer that never reads
				}
				wg.Add(1)
				go func() {
					defer wg.Done()
					for {
						kind, msg, err := c.ReadMessage()
						if err != nil {
							return
						}
						if kind == websocket.BinaryMessage && msg[0] == msgFrame {
							got.Add(1)
						} else if kind == websocket.TextMessage {
							var m struct{ Type string }
							json.Unmarshal(msg, &m)
						}
					}
				}()
			}
			viewed := rerun(11 + 2*r)
			with += viewed
			ratios = append(ratios, viewed/alone)
			for _, c := range conns {
				c.Close()
			}
			wg.Wait()
		}
		if got.Load() == 0 {
			b.Fatal("the reading viewers received no frame updates")
		}
		b.ReportMetric(none/rounds, "frames/s-alone")
		b.ReportMetric(with/rounds, "frames/s-21viewers")
		b.ReportMetric(with/none, "ratio")
		sort.Float64s(ratios)
		b.ReportMetric((ratios[rounds/2-1]+ratios[rounds/2])/2, "median-pair-ratio")
		b.Logf("per-round ratios (viewers/alone, each pair back to back): %.3f", ratios)
		b.ReportMetric(float64(got.Load())/float64(readers*rounds), "updates/viewer/run")
	}
}
