package frames

import (
	"bytes"
	"errors"
	"fmt"
	"io"
	"os"

	"sparsewatch/frames/fits"
)

// entry is one file of a folder or archive, in sequence order.
type entry struct {
	name string
	err  error // known before opening (e.g. an unsafe archive path)
	// open returns the file's bytes as a stream (images, archive entries).
	open func() (io.ReadCloser, error)
	// path, when set, is a file on disk that FITS can read with ReadAt.
	path string
	size int64 // declared size, -1 if unknown
}

// entrySource decodes a list of entries in order. It owns one frame and one
// file buffer, reused from frame to frame.
type entrySource struct {
	entries []entry
	opts    Options
	next    int // next entry
	index   int // next item index
	gate    sizeGate
	frame   Frame
	buf     []byte
	closer  func() error

	// FITS file being read plane by plane.
	cube      *fits.File
	cubeFile  io.Closer
	cubeName  string
	cubePlane int
	cubeFree  bool // the file is in memory: pixel reads cost no storage bytes
	plane     fitsPlane
}

func (s *entrySource) Len() int {
	return len(s.entries)
}

func (s *entrySource) Close() error {
	s.closeCube()
	if s.closer != nil {
		return s.closer()
	}
	return nil
}

func (s *entrySource) closeCube() {
	if s.cubeFile != nil {
		s.cubeFile.Close()
	}
	s.cube, s.cubeFile = nil, nil
}

func (s *entrySource) item(name string, err error) Item {
	it := Item{Index: s.index, Name: name}
	if err != nil {
		it.Err = &FileError{Name: name, Err: err}
	}
	s.index++
	return it
}

func (s *entrySource) Next() (Item, error) {
	if s.cube != nil && s.cubePlane < s.cube.Planes {
		return s.planeItem(0), nil
	}
	s.closeCube()
	if s.next >= len(s.entries) {
		return Item{}, io.EOF
	}
	e := s.entries[s.next]
	s.next++
	if e.err != nil {
		return s.item(e.name, e.err), nil
	}
	if FormatOf(e.name) == FITS {
		return s.openFITS(e), nil
	}
	data, err := s.readAll(e)
	if err != nil {
		return s.item(e.name, err), nil
	}
	if Sniff(data) == FITS {
		return s.openFITSBytes(e, data), nil
	}
	_, cfg, err := DecodeConfig(data)
	if err == nil {
		err = CheckSize(int64(cfg.Width), int64(cfg.Height), s.opts.maxPixels())
	}
	if err == nil {
		err = s.gate.check(cfg.Width, cfg.Height)
	}
	if err == nil {
		_, err = Decode(data, s.opts.maxPixels(), &s.frame)
	}
	it := s.item(e.name, err)
	it.Bytes = int64(len(data))
	if err == nil {
		it.Frame, it.Pixels = &s.frame, &s.frame
	}
	return it, nil
}

// readAll reads an entry into the reused buffer, refusing files over the
// size limit.
func (s *entrySource) readAll(e entry) ([]byte, error) {
	max := s.opts.maxFileBytes()
	if e.size > max {
		return nil, fmt.Errorf("frames: file is %d bytes, over the %d-byte limit", e.size, max)
	}
	rc, err := e.open()
	if err != nil {
		return nil, fmt.Errorf("frames: %w", err)
	}
	defer rc.Close()
	b := bytes.NewBuffer(s.buf[:0])
	n, err := b.ReadFrom(io.LimitReader(rc, max+1))
	s.buf = b.Bytes()
	if err != nil {
		return nil, fmt.Errorf("frames: reading: %w", err)
	}
	if n > max {
		return nil, fmt.Errorf("frames: file is over the %d-byte limit", max)
	}
	return s.buf, nil
}

func (s *entrySource) openFITS(e entry) Item {
	if e.path == "" {
		data, err := s.readAll(e)
		if err != nil {
			return s.item(e.name, err)
		}
		return s.openFITSBytes(e, data)
	}
	f, err := os.Open(e.path)
	if err != nil {
		return s.item(e.name, fmt.Errorf("frames: %w", err))
	}
	st, err := f.Stat()
	if err != nil {
		f.Close()
		return s.item(e.name, fmt.Errorf("frames: %w", err))
	}
	return s.startCube(e.name, f, f, st.Size(), false)
}

func (s *entrySource) openFITSBytes(e entry, data []byte) Item {
	// The buffer is reused for the next file: the cube gets its own copy.
	own := append([]byte(nil), data...)
	it := s.startCube(e.name, bytes.NewReader(own), nil, int64(len(own)), true)
	if it.Err == nil {
		it.Bytes = int64(len(own))
	}
	return it
}

func (s *entrySource) startCube(name string, r io.ReaderAt, c io.Closer, size int64, free bool) Item {
	f, err := fits.Open(r, size, s.opts.maxPixels())
	if err == nil {
		err = s.gate.check(f.Width, f.Height)
	}
	if err != nil {
		if c != nil {
			c.Close()
		}
		var tl *fits.TooLargeError
		if errors.As(err, &tl) {
			err = &TooLargeError{Width: tl.Width, Height: tl.Height, Limit: tl.Limit}
		}
		return s.item(name, err)
	}
	f.MergeGap = s.opts.FITSMergeGap
	s.cube, s.cubeFile, s.cubeName, s.cubePlane, s.cubeFree = f, c, name, 0, free
	return s.planeItem(f.HeaderBytes())
}

func (s *entrySource) planeItem(header int64) Item {
	name := s.cubeName
	if s.cube.Planes > 1 {
		name = fmt.Sprintf("%s[%d]", s.cubeName, s.cubePlane)
	}
	s.plane = fitsPlane{f: s.cube, p: s.cubePlane, free: s.cubeFree}
	s.cubePlane++
	it := s.item(name, nil)
	it.Pixels = &s.plane
	if !s.cubeFree {
		it.Bytes = header
	}
	return it
}

// fitsPlane is one plane of a FITS file as a WholeReader.
type fitsPlane struct {
	f    *fits.File
	p    int
	free bool
}

func (pl *fitsPlane) Size() (int, int) { return pl.f.Width, pl.f.Height }

func (pl *fitsPlane) ReadPixels(idx []int32, dst []float32) (int64, error) {
	n, err := pl.f.ReadPixels(pl.p, idx, dst)
	if pl.free {
		n = 0
	}
	return n, err
}

func (pl *fitsPlane) ReadAll(dst []float32) (int64, error) {
	n, err := pl.f.ReadPlane(pl.p, dst)
	if pl.free {
		n = 0
	}
	return n, err
}

// File returns the FITS file behind the plane, for tests and tools.
func (pl *fitsPlane) File() *fits.File { return pl.f }
