package server

import (
	"encoding/binary"
	"testing"
)

func TestSlowViewerKeepsOnlyLatest(t *testing.T) {
	h := newHub()
	slow, fast := newViewer(roleViewer), newViewer(roleViewer)
	h.add(slow)
	h.add(fast)
	var got []uint32
	for f := uint32(0); f < 1000; f++ {
		msg := make([]byte, 8)
		msg[0] = msgFrame
		binary.LittleEndian.PutUint32(msg[4:], f)
		h.publish(msgFrame, msg) // must never block, whoever reads
		if f%100 == 0 {
			p := fast.take(true)
			got = append(got, binary.LittleEndian.Uint32(p.frame[4:]))
		}
	}
	if len(got) != 10 || got[9] != 900 {
		t.Fatalf("fast viewer saw %v", got)
	}
	p := slow.take(true)
	if f := binary.LittleEndian.Uint32(p.frame[4:]); f != 999 {
		t.Fatalf("slow viewer's slot holds frame %d, want the latest 999", f)
	}
	if p := slow.take(true); p.frame != nil {
		t.Fatal("slot not emptied by take")
	}
}

func TestEventOverflowResyncs(t *testing.T) {
	h := newHub()
	v := newViewer(roleViewer)
	h.add(v)
	for i := 0; i < maxViewerEvents-1; i++ {
		h.publishEvent([]byte("e"))
	}
	if p := v.take(true); p.resync || len(p.events) != maxViewerEvents-1 {
		t.Fatalf("below the bound: resync %v, %d events", p.resync, len(p.events))
	}
	for i := 0; i < maxViewerEvents+5; i++ {
		h.publishEvent([]byte("e"))
	}
	p := v.take(true)
	if !p.resync || len(p.events) > maxViewerEvents {
		t.Fatalf("over the bound: resync %v, %d events queued", p.resync, len(p.events))
	}
	h.remove(v)
	if h.count.Load() != 0 {
		t.Fatal("viewer count after remove")
	}
}

func TestFrameDueLimitsRate(t *testing.T) {
	v := newViewer(roleViewer)
	v.put(msgFrame, []byte{msgFrame})
	v.putEvent([]byte("alarm"))
	p := v.take(false)
	if p.frame != nil || !p.frameLeft || len(p.events) != 1 {
		t.Fatalf("not due: frame %v left %v events %d", p.frame, p.frameLeft, len(p.events))
	}
	if p := v.take(true); p.frame == nil {
		t.Fatal("due frame not handed out")
	}
}
