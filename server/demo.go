package server

import (
	"fmt"
	"io"
	"strings"

	"sparsewatch/frames"
	"sparsewatch/samples"
)

// lookupDemo returns the named scenario ("" or "default" = the first).
func lookupDemo(name string) (samples.Scenario, error) {
	if name == "" || name == "default" {
		names := samples.Names()
		if len(names) == 0 {
			return samples.Scenario{}, errorf(KindUnavailable, "no demo scenarios in this build")
		}
		name = names[0]
	}
	sc, err := samples.Lookup(name)
	if err != nil {
		return sc, errorf(KindNotFound, "demo scenario %q unknown (have %s)", name, strings.Join(samples.Names(), ", "))
	}
	return sc, nil
}

// demoSource renders a scenario's frames one by one, in order.
type demoSource struct {
	sc   samples.Scenario
	next int
	fr   frames.Frame
	opts frames.Options
}

func openDemo(name string, opts frames.Options) (frames.Source, error) {
	sc, err := lookupDemo(name)
	if err != nil {
		return nil, err
	}
	if err := frames.CheckSize(int64(sc.Width), int64(sc.Height), opts.MaxPixels); err != nil {
		return nil, errorf(KindInvalid, "demo %s: %v", sc.Name, err)
	}
	return &demoSource{sc: sc, opts: opts}, nil
}

func (d *demoSource) Len() int     { return d.sc.Frames }
func (d *demoSource) Close() error { return nil }

func (d *demoSource) Next() (frames.Item, error) {
	if d.next >= d.sc.Frames {
		return frames.Item{}, io.EOF
	}
	i := d.next
	d.next++
	it := frames.Item{Index: i, Name: samples.FrameName(i)}
	img, err := d.sc.Frame(i)
	if err != nil {
		it.Err = &frames.FileError{Name: it.Name, Err: err}
		return it, nil
	}
	frames.FromImage(img, &d.fr)
	it.Frame, it.Pixels = &d.fr, &d.fr
	return it, nil
}

// Demos lists the demo scenarios for the page.
func demoList() []map[string]any {
	var out []map[string]any
	for _, n := range samples.Names() {
		sc, err := samples.Lookup(n)
		if err != nil {
			continue
		}
		out = append(out, map[string]any{
			"name": n, "title": n, "about": sc.Description,
			"width": sc.Width, "height": sc.Height, "frames": sc.Frames,
			"reference_frames": sc.ReferenceFrames,
		})
	}
	return out
}

// CreateDemo makes a session that reviews a demo scenario. Parameters the
// caller did not set (set lists those it did) take demo values that start
// watching within half a minute and find the change: the scenario's
// reference frames, 4 x 4 tiles, design shift 2 (a stream's reference is
// estimated from few frames, and a shift of 1 lets streams with an
// estimation bias over half a sigma climb for ever), a target of one false
// alarm in 2000 frames and 100 calibration paths.
func (s *Server) CreateDemo(scenario, name string, p Params, set map[string]bool) (*Session, error) {
	sc, err := lookupDemo(scenario)
	if err != nil {
		return nil, err
	}
	if !set["reference_frames"] && sc.ReferenceFrames >= 2 {
		p.ReferenceFrames = sc.ReferenceFrames
	}
	if !set["tile"] {
		p.Tile = 4
	}
	if !set["shift"] {
		p.Shift = 2
	}
	if !set["arl0"] {
		p.ARL0 = 2000
	}
	if !set["paths"] {
		p.Paths = 100
	}
	if err := validateParams(p); err != nil {
		return nil, err
	}
	id, dir, err := s.newSessionDir()
	if err != nil {
		return nil, err
	}
	if name == "" {
		name = "demo: " + sc.Name
	}
	return s.createSession(id, dir, name, Source{Kind: "demo", Scenario: sc.Name}, p)
}

// EnsureDemo returns the owner URL of a session of the named demo scenario,
// making one when the data directory has none yet.
func (s *Server) EnsureDemo(scenario string) (string, error) {
	sc, err := lookupDemo(scenario)
	if err != nil {
		return "", err
	}
	s.mu.RLock()
	var found *Session
	for _, sess := range s.sessions {
		if m := sess.metaCopy(); m.Source.Kind == "demo" && m.Source.Scenario == sc.Name && (found == nil || m.Created.After(found.metaCopy().Created)) {
			found = sess
		}
	}
	s.mu.RUnlock()
	if found == nil {
		if found, err = s.CreateDemo(sc.Name, "", DefaultParams(), nil); err != nil {
			return "", fmt.Errorf("server: demo session: %w", err)
		}
	}
	m := found.metaCopy()
	return s.ownerURL(m.ID, m.OwnerToken), nil
}
