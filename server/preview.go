package server

import (
	"archive/zip"
	"fmt"
	"path/filepath"
	"sync"

	"sparsewatch/frames"
)

// previewReq asks for a preview of one frame, for everyone or one viewer.
type previewReq struct {
	frame int
	name  string
	to    *viewer // nil: publish to all viewers
}

// previewer decodes and encodes preview images in its own goroutine, so a
// preview never slows the review. Its queue has one slot: a request that
// finds the slot full replaces the waiting one.
type previewer struct {
	s    *Session
	mu   sync.Mutex // guards next and running
	next *previewReq
	run  bool
}

func newPreviewer(s *Session) *previewer { return &previewer{s: s} }

// request queues r, replacing a request still waiting; it never blocks.
func (p *previewer) request(r previewReq) {
	p.mu.Lock()
	p.next = &r
	start := !p.run
	p.run = true
	p.mu.Unlock()
	if start {
		go p.loop()
	}
}

func (p *previewer) loop() {
	for {
		p.mu.Lock()
		r := p.next
		p.next = nil
		if r == nil {
			p.run = false
			p.mu.Unlock()
			return
		}
		p.mu.Unlock()
		msg, err := p.s.previewOf(r.frame, r.name)
		if err != nil {
			p.s.log.Debug("no preview", "frame", r.frame, "err", err)
			continue
		}
		if r.to != nil {
			r.to.put(msgPreview, msg)
		} else {
			p.s.hub.publish(msgPreview, msg)
		}
	}
}

// previewOf reads frame index (file name) again and encodes its preview.
func (s *Session) previewOf(index int, name string) ([]byte, error) {
	m := s.metaCopy()
	var fr frames.Frame
	opts := frames.Options{MaxPixels: int64(s.srv.opt.MaxPixels), MaxFileBytes: s.srv.maxFileBytes()}
	switch {
	case isLiveKind(m.Source.Kind):
		feed, err := s.feedOf()
		if err != nil {
			return nil, err
		}
		return feed.shotImage()
	case m.Source.Kind == "demo":
		sc, err := lookupDemo(m.Source.Scenario)
		if err != nil {
			return nil, err
		}
		img, err := sc.Frame(index)
		if err != nil {
			return nil, err
		}
		frames.FromImage(img, &fr)
	case uploadKind(m.Source.Files) == uploadKindZip:
		zr, err := zip.OpenReader(filepath.Join(s.dir, framesDirName, m.Source.Files[0]))
		if err != nil {
			return nil, err
		}
		defer zr.Close()
		var data []byte
		for _, f := range zr.File {
			if f.Name == name {
				data, err = readEntry(entry{Name: f.Name, open: f.Open}, opts.MaxFileBytes)
				break
			}
		}
		if err != nil || data == nil {
			return nil, fmt.Errorf("server: preview of %q: not in the archive (%v)", name, err)
		}
		if _, err := frames.Decode(data, opts.MaxPixels, &fr); err != nil {
			return nil, err
		}
	default:
		if name == "" || filepath.Base(name) != name {
			return nil, fmt.Errorf("server: preview: bad file name %q", name)
		}
		src, err := frames.OpenFile(filepath.Join(s.dir, framesDirName, name), opts)
		if err != nil {
			return nil, err
		}
		defer src.Close()
		it, err := src.Next()
		if err != nil {
			return nil, err
		}
		if it.Err != nil {
			return nil, it.Err
		}
		f, _, err := frames.Full(it, &fr)
		if err != nil {
			return nil, err
		}
		fr = *f
	}
	return encodePreview(index, gridImage{W: fr.Width, H: fr.Height, Stride: fr.Stride, Pix: fr.Pix}), nil
}

// greet gives a new viewer of a session that is not running (finished,
// stopped, failed) the last frame's numbers and preview, so it does not
// show an empty frame; a running session's next update comes at once.
func (s *Session) greet(v *viewer) {
	st := s.Status()
	if st.Frame < 0 || st.GridW == 0 {
		return
	}
	if st.State != StateFinished && st.State != StateStopped && st.State != StateFailed {
		return
	}
	wire := byte(wireWatching)
	if st.State == StateFinished {
		wire = wireFinished
	}
	var regions []box // of an episode still on at the last frame
	if al := s.Alarms(); len(al) > 0 && al[len(al)-1].EndFrame < 0 {
		for _, r := range al[len(al)-1].Regions {
			regions = append(regions, box{r.BBox[0], r.BBox[1], r.BBox[2], r.BBox[3], r.Peak})
		}
	}
	v.put(msgFrame, newMaskEncoder(st.GridW, st.GridH).encode(nil, wire, st.Frame, st.G, st.Limit, nil, regions))
	s.seek(v, st.Frame)
}

// seek sends viewer v a preview of frame f (owner's "seek" message).
func (s *Session) seek(v *viewer, f int) {
	name, ok := s.frameName(f)
	if !ok {
		return
	}
	s.previews.request(previewReq{frame: f, name: name, to: v})
}

// frameName returns the file name of frame index f, from the session's
// source listing (natural order, as the review counts frames).
func (s *Session) frameName(f int) (string, bool) {
	m := s.metaCopy()
	if m.Source.Kind == "demo" || isLiveKind(m.Source.Kind) { // live: the latest kept frame
		return "", f >= 0
	}
	s.mu.Lock()
	names := s.names
	s.mu.Unlock()
	if names == nil { // uploads never change: list them once
		var err error
		if names, err = s.srv.frameNames(s.dir, m.Source); err != nil {
			return "", false
		}
		s.mu.Lock()
		s.names = names
		s.mu.Unlock()
	}
	if f < 0 || f >= len(names) {
		return "", false
	}
	return names[f], true
}
