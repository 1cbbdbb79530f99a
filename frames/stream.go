package frames

import (
	"bufio"
	"bytes"
	"encoding/binary"
	"errors"
	"fmt"
	"io"
	"slices"
)

// ImageStream is a Source over a byte stream of concatenated PNG and JPEG
// images (a pipe, stdin, an upload). It finds each image's end from the
// format's own structure (PNG chunks up to IEND; JPEG markers up to EOI), so
// no separator is needed. Bytes that start no image are skipped up to the
// next PNG signature or JPEG start and reported as one bad item.
type ImageStream struct {
	r     *bufio.Reader
	opts  Options
	name  string
	index int
	gate  sizeGate
	frame Frame
	buf   []byte
	err   error // sticky read error
}

// NewImageStream reads images from r; name labels items ("stdin" gives
// "stdin#0", "stdin#1", ...).
func NewImageStream(r io.Reader, name string, opts Options) *ImageStream {
	if name == "" {
		name = "stream"
	}
	return &ImageStream{r: bufio.NewReaderSize(r, 64<<10), opts: opts, name: name}
}

// Len is -1: a stream's length is not known in advance.
func (s *ImageStream) Len() int { return -1 }

// Close does nothing; the caller owns the reader.
func (s *ImageStream) Close() error { return nil }

var (
	pngSig  = []byte("\x89PNG\r\n\x1a\n")
	jpegSOI = []byte{0xff, 0xd8, 0xff}
)

// Next returns the next image of the stream, io.EOF at its clean end.
func (s *ImageStream) Next() (Item, error) {
	if s.err != nil {
		return Item{}, s.err
	}
	name := fmt.Sprintf("%s#%d", s.name, s.index)
	head, err := s.r.Peek(8)
	if len(head) == 0 && err != nil {
		if errors.Is(err, io.EOF) {
			s.err = io.EOF
			return Item{}, io.EOF
		}
		s.err = fmt.Errorf("frames: %s: %w", s.name, err)
		return Item{}, s.err
	}
	var data []byte
	switch {
	case bytes.HasPrefix(head, pngSig):
		data, err = s.readPNG()
	case bytes.HasPrefix(head, jpegSOI):
		data, err = s.readJPEG()
	default:
		n := s.skipGarbage()
		return s.item(name, FormatError(fmt.Sprintf("%d bytes that start no PNG or JPEG image (starting %q) skipped", n, head))), nil
	}
	if err != nil {
		// The image's end could not be found. At the end of the stream
		// that is all; otherwise the next call resynchronises on the next
		// image start.
		if _, perr := s.r.Peek(1); perr != nil {
			s.err = io.EOF
		}
		it := s.item(name, err)
		it.Bytes = int64(len(data))
		return it, nil
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
	it := s.item(name, err)
	it.Bytes = int64(len(data))
	if err == nil {
		it.Frame, it.Pixels = &s.frame, &s.frame
	}
	return it, nil
}

func (s *ImageStream) item(name string, err error) Item {
	it := Item{Index: s.index, Name: name}
	if err != nil {
		it.Err = &FileError{Name: name, Err: err}
	}
	s.index++
	return it
}

// take appends n bytes of the stream to s.buf.
func (s *ImageStream) take(n int) error {
	if int64(len(s.buf))+int64(n) > s.opts.maxFileBytes() {
		return fmt.Errorf("frames: image is over the %d-byte limit", s.opts.maxFileBytes())
	}
	start := len(s.buf)
	s.buf = slices.Grow(s.buf, n)[:start+n]
	if _, err := io.ReadFull(s.r, s.buf[start:]); err != nil {
		return FormatError("stream ends inside an image (truncated)")
	}
	return nil
}

// readPNG reads the signature and chunks up to and including IEND (PNG
// specification, ISO/IEC 15948, section 5.3: length, type, data, CRC).
func (s *ImageStream) readPNG() ([]byte, error) {
	s.buf = s.buf[:0]
	if err := s.take(8); err != nil {
		return s.buf, err
	}
	for {
		if err := s.take(8); err != nil {
			return s.buf, err
		}
		hdr := s.buf[len(s.buf)-8:]
		n := binary.BigEndian.Uint32(hdr[:4])
		typ := string(hdr[4:8])
		if n > 1<<31-1 {
			return s.buf, FormatError("PNG chunk length over 2^31-1")
		}
		if err := s.take(int(n) + 4); err != nil {
			return s.buf, err
		}
		if typ == "IEND" {
			return s.buf, nil
		}
	}
}

// readJPEG reads from SOI to EOI (ITU-T T.81, annex B): marker segments
// carry a length; after SOS the entropy-coded data run until a marker
// that is not a stuffed 0xFF00 or a restart marker RSTn.
func (s *ImageStream) readJPEG() ([]byte, error) {
	s.buf = s.buf[:0]
	if err := s.take(2); err != nil {
		return s.buf, err
	}
	for {
		// Find the next marker: 0xFF, fill bytes 0xFF, then the code.
		c, err := s.byte()
		if err != nil {
			return s.buf, err
		}
		if c != 0xff {
			return s.buf, FormatError("JPEG: expected a marker")
		}
		for c == 0xff {
			if c, err = s.byte(); err != nil {
				return s.buf, err
			}
		}
		switch {
		case c == 0xd9: // EOI
			return s.buf, nil
		case c == 0x01 || (c >= 0xd0 && c <= 0xd7): // TEM, RSTn: no length
			continue
		}
		if err := s.take(2); err != nil {
			return s.buf, err
		}
		n := int(binary.BigEndian.Uint16(s.buf[len(s.buf)-2:]))
		if n < 2 {
			return s.buf, FormatError("JPEG: marker segment length below 2")
		}
		if err := s.take(n - 2); err != nil {
			return s.buf, err
		}
		if c == 0xda { // SOS: entropy-coded data follow
			if err := s.scanEntropy(); err != nil {
				return s.buf, err
			}
		}
	}
}

// scanEntropy copies entropy-coded bytes up to (not including) the next
// real marker, which it leaves unread. It scans the reader's buffer for
// 0xFF with IndexByte rather than byte by byte.
func (s *ImageStream) scanEntropy() error {
	max := s.opts.maxFileBytes()
	for {
		if int64(len(s.buf)) > max {
			return fmt.Errorf("frames: image is over the %d-byte limit", max)
		}
		n := s.r.Buffered()
		if n < 2 {
			n = 2
		}
		b, _ := s.r.Peek(n)
		if len(b) < 2 {
			return FormatError("stream ends inside an image (truncated)")
		}
		i := bytes.IndexByte(b[:len(b)-1], 0xff)
		if i < 0 {
			k := len(b) - 1
			s.buf = append(s.buf, b[:k]...)
			s.r.Discard(k)
			continue
		}
		s.buf = append(s.buf, b[:i]...)
		s.r.Discard(i)
		next := b[i+1]
		switch {
		case next == 0x00 || (next >= 0xd0 && next <= 0xd7): // stuffed byte or RSTn
			s.buf = append(s.buf, 0xff, next)
			s.r.Discard(2)
		case next == 0xff: // fill byte
			s.buf = append(s.buf, 0xff)
			s.r.Discard(1)
		default:
			return nil // a marker: readJPEG reads it
		}
	}
}

func (s *ImageStream) byte() (byte, error) {
	c, err := s.r.ReadByte()
	if err != nil {
		return 0, FormatError("stream ends inside an image (truncated)")
	}
	if int64(len(s.buf)) >= s.opts.maxFileBytes() {
		return 0, fmt.Errorf("frames: image is over the %d-byte limit", s.opts.maxFileBytes())
	}
	s.buf = append(s.buf, c)
	return c, nil
}

// skipGarbage discards bytes up to the next PNG signature or JPEG start
// (or the end) and returns how many it dropped.
func (s *ImageStream) skipGarbage() int {
	n := 0
	for {
		b, err := s.r.Peek(3)
		if len(b) < 3 {
			// Fewer than 3 bytes left: none can start an image.
			k, _ := s.r.Discard(len(b))
			if err != nil && !errors.Is(err, io.EOF) {
				s.err = fmt.Errorf("frames: %s: %w", s.name, err)
			}
			return n + k
		}
		if n > 0 && (bytes.Equal(b, jpegSOI) || bytes.Equal(b, pngSig[:3])) {
			if bytes.Equal(b, jpegSOI) {
				return n
			}
			if p, _ := s.r.Peek(8); bytes.Equal(p, pngSig) {
				return n
			}
		}
		s.r.Discard(1)
		n++
	}
}
