package server

import (
	"sync"
	"sync/atomic"
)

// maxViewerEvents bounds a viewer's queue of text messages (alarms, status).
// A viewer that lets it overflow gets a fresh hello instead of the backlog.
const maxViewerEvents = 64

// viewer is one websocket connection's mailbox. Frame updates, previews and
// heat images each have a one-slot "latest" buffer: publishing overwrites
// the slot, so a slow viewer skips stale frames and the review never waits.
type viewer struct {
	role   string // "owner" or "viewer"
	heatOn atomic.Bool

	mu      sync.Mutex // guards the slots below
	frame   []byte
	preview []byte
	heat    []byte
	events  [][]byte
	resync  bool

	wake chan struct{} // capacity 1: "something is pending"
}

func newViewer(role string) *viewer {
	return &viewer{role: role, wake: make(chan struct{}, 1)}
}

func (v *viewer) signal() {
	select {
	case v.wake <- struct{}{}:
	default:
	}
}

func (v *viewer) put(kind byte, msg []byte) {
	v.mu.Lock()
	switch kind {
	case msgFrame:
		v.frame = msg
	case msgPreview:
		v.preview = msg
	case msgHeat:
		v.heat = msg
	}
	v.mu.Unlock()
	v.signal()
}

func (v *viewer) putEvent(msg []byte) {
	v.mu.Lock()
	if len(v.events) >= maxViewerEvents {
		v.events = v.events[:0]
		v.resync = true
	} else if !v.resync {
		v.events = append(v.events, msg)
	}
	v.mu.Unlock()
	v.signal()
}

// pending is what a writer takes from a viewer in one go.
type pending struct {
	resync               bool
	events               [][]byte
	frame, preview, heat []byte
	frameLeft            bool // a frame is waiting but was not due yet
}

// take empties the mailbox; the frame slot only when frameDue.
func (v *viewer) take(frameDue bool) pending {
	v.mu.Lock()
	defer v.mu.Unlock()
	p := pending{resync: v.resync, events: v.events, preview: v.preview, heat: v.heat}
	v.resync, v.events, v.preview, v.heat = false, nil, nil, nil
	if frameDue {
		p.frame, v.frame = v.frame, nil
	} else {
		p.frameLeft = v.frame != nil
	}
	return p
}

// hub fans a session's messages out to its viewers. Its mutex guards only
// the viewer set; publishing costs one slot write per viewer.
type hub struct {
	mu      sync.RWMutex
	viewers map[*viewer]struct{}
	count   atomic.Int32 // len(viewers), read without the lock by the review loop
	heat    atomic.Int32 // viewers that asked for heat images
}

func newHub() *hub { return &hub{viewers: make(map[*viewer]struct{})} }

func (h *hub) add(v *viewer) {
	h.mu.Lock()
	h.viewers[v] = struct{}{}
	h.count.Store(int32(len(h.viewers)))
	h.mu.Unlock()
}

func (h *hub) remove(v *viewer) {
	h.mu.Lock()
	if _, ok := h.viewers[v]; ok {
		delete(h.viewers, v)
		if v.heatOn.Swap(false) {
			h.heat.Add(-1)
		}
	}
	h.count.Store(int32(len(h.viewers)))
	h.mu.Unlock()
}

func (h *hub) setHeat(v *viewer, on bool) {
	h.mu.Lock()
	defer h.mu.Unlock()
	if _, ok := h.viewers[v]; !ok {
		return
	}
	if v.heatOn.Swap(on) != on {
		if on {
			h.heat.Add(1)
		} else {
			h.heat.Add(-1)
		}
	}
}

// publish puts a binary message in every viewer's slot of that kind (heat
// only to viewers that asked for it). msg must not be changed afterwards.
func (h *hub) publish(kind byte, msg []byte) {
	h.mu.RLock()
	for v := range h.viewers {
		if kind == msgHeat && !v.heatOn.Load() {
			continue
		}
		v.put(kind, msg)
	}
	h.mu.RUnlock()
}

// publishEvent queues a text message for every viewer.
func (h *hub) publishEvent(msg []byte) {
	h.mu.RLock()
	for v := range h.viewers {
		v.putEvent(msg)
	}
	h.mu.RUnlock()
}
