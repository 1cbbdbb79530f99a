package live

import (
	"bufio"
	"bytes"
	"errors"
	"fmt"
	"io"
	"mime"
	"net/textproto"
	"strconv"
	"strings"
)

// Limits of the part parser; a camera that exceeds them is broken or hostile.
const (
	maxHeaderLine  = 4 << 10 // bytes in one part-header line
	maxHeaderLines = 32
	maxPreamble    = 64 << 10 // bytes skipped looking for the first boundary
)

// ErrPartTooLarge reports a part over the size limit; the reader skips to
// the next boundary, so the stream can go on.
var ErrPartTooLarge = errors.New("frames: multipart part too large")

// BoundaryOf returns the boundary of a multipart Content-Type such as
// "multipart/x-mixed-replace; boundary=frame".
func BoundaryOf(contentType string) (string, error) {
	mt, params, err := mime.ParseMediaType(contentType)
	if err != nil {
		return "", fmt.Errorf("frames: content type %q: %w", contentType, err)
	}
	if !strings.HasPrefix(mt, "multipart/") {
		return "", fmt.Errorf("frames: content type %q is not multipart", contentType)
	}
	b := params["boundary"]
	if b == "" || len(b) > 200 {
		return "", fmt.Errorf("frames: content type %q has no usable boundary", contentType)
	}
	return b, nil
}

// PartReader splits a multipart/x-mixed-replace body into parts. It is
// lenient the way camera streams need: a part may carry Content-Length (then
// exactly that many bytes are taken) or not (then the body runs to the next
// delimiter line); the boundary may be written with or without the "--"
// that RFC 2046 section 5.1.1 puts in front; bytes before the first
// delimiter are skipped; a missing close delimiter is a plain end of stream.
type PartReader struct {
	r       *bufio.Reader
	delims  [][]byte // "--"+boundary, and boundary itself when it starts with "--"
	maxPart int
	started bool
	pending bool // a counted body was read; its delimiter line is next
	done    bool
}

// Part is one body part.
type Part struct {
	Header textproto.MIMEHeader
	Body   []byte
}

// NewPartReader reads parts of at most maxPart bytes from r.
func NewPartReader(r io.Reader, boundary string, maxPart int) *PartReader {
	p := &PartReader{r: bufio.NewReaderSize(r, 64<<10), maxPart: maxPart}
	p.delims = append(p.delims, []byte("--"+boundary))
	if strings.HasPrefix(boundary, "--") {
		p.delims = append(p.delims, []byte(boundary))
	}
	// The RFC form ("--" + boundary) is tried first.
	return p
}

// Next returns the next part. io.EOF means a clean end (close delimiter or
// end of stream between parts); io.ErrUnexpectedEOF a stream cut inside a
// part; ErrPartTooLarge a skipped part, after which Next may be called
// again. Other errors come from the underlying reader.
func (p *PartReader) Next() (Part, error) {
	if p.done {
		return Part{}, io.EOF
	}
	if !p.started {
		if err := p.skipPreamble(); err != nil {
			return Part{}, err
		}
		p.started = true
	} else if p.pending {
		// The delimiter after a counted body is read only now, so a part
		// is handed over as soon as its last byte arrives.
		p.pending = false
		if err := p.skipToDelimiter(); err != nil {
			p.done = errors.Is(err, io.EOF)
			return Part{}, err
		}
	}
	hdr, err := p.readHeader()
	if err != nil {
		return Part{}, err
	}
	if n, ok := contentLength(hdr); ok {
		if n > p.maxPart {
			if _, err := io.CopyN(io.Discard, p.r, int64(n)); err != nil {
				return Part{}, unexpected(err)
			}
			p.pending = true
			return Part{}, ErrPartTooLarge
		}
		body := make([]byte, n)
		if _, err := io.ReadFull(p.r, body); err != nil {
			return Part{}, unexpected(err)
		}
		p.pending = true
		return Part{Header: hdr, Body: body}, nil
	}
	body, err := p.readToDelimiter()
	if err != nil {
		return Part{}, err
	}
	return Part{Header: hdr, Body: body}, nil
}

func unexpected(err error) error {
	if errors.Is(err, io.EOF) {
		return io.ErrUnexpectedEOF
	}
	return err
}

// atDelimiter reports whether the reader is at a delimiter and consumes
// the delimiter line when it is; closing reports a close delimiter (or a
// delimiter at the very end of the stream). It peeks only as many bytes as
// a delimiter has, so a camera that pauses right after a delimiter line
// does not hold back the part before it.
func (p *PartReader) atDelimiter() (found, closing bool, err error) {
	for _, d := range p.delims {
		peek, perr := p.r.Peek(len(d))
		if !bytes.Equal(peek, d) {
			if perr != nil && len(peek) == 0 {
				return false, false, perr
			}
			continue
		}
		if _, err := p.r.Discard(len(d)); err != nil {
			return false, false, unexpected(err)
		}
		rest, err := p.readLine()
		switch {
		case errors.Is(err, io.EOF):
			return true, true, nil
		case err != nil:
			return false, false, err
		}
		return true, bytes.HasPrefix(rest, []byte("--")), nil
	}
	return false, false, nil
}

// readLine consumes the rest of the current line (a delimiter's transport
// padding, or its closing "--") and returns its first two bytes.
func (p *PartReader) readLine() ([]byte, error) {
	var head []byte
	for n := 0; ; {
		b, err := p.r.ReadSlice('\n')
		n += len(b)
		if len(head) < 2 {
			head = append(head, b[:min(len(b), 2-len(head))]...)
		}
		if err == nil {
			return head, nil
		}
		if !errors.Is(err, bufio.ErrBufferFull) {
			return head, err
		}
		if n > maxHeaderLine {
			return nil, errors.New("frames: multipart delimiter line too long")
		}
	}
}

func (p *PartReader) skipPreamble() error {
	lineStart := true
	for skipped := 0; skipped <= maxPreamble; {
		if lineStart {
			found, closing, err := p.atDelimiter()
			if err != nil {
				return err
			}
			if found {
				if closing {
					p.done = true
					return io.EOF
				}
				return nil
			}
		}
		b, err := p.r.ReadSlice('\n')
		skipped += len(b)
		switch {
		case err == nil:
			lineStart = true
		case errors.Is(err, bufio.ErrBufferFull):
			lineStart = false
		default:
			return err
		}
	}
	return errors.New("frames: no multipart boundary in the first 64 KB")
}

func (p *PartReader) readHeader() (textproto.MIMEHeader, error) {
	hdr := textproto.MIMEHeader{}
	for lines := 0; ; lines++ {
		if lines > maxHeaderLines {
			return nil, errors.New("frames: multipart part has too many header lines")
		}
		line, err := p.r.ReadSlice('\n')
		if errors.Is(err, bufio.ErrBufferFull) || len(line) > maxHeaderLine {
			return nil, errors.New("frames: multipart header line too long")
		}
		if err != nil {
			return nil, unexpected(err)
		}
		s := strings.TrimRight(string(line), "\r\n")
		if s == "" {
			return hdr, nil
		}
		k, v, ok := strings.Cut(s, ":")
		if !ok {
			return nil, fmt.Errorf("frames: multipart header line %q has no colon", truncate(s, 60))
		}
		hdr.Add(strings.TrimSpace(k), strings.TrimSpace(v))
	}
}

func truncate(s string, n int) string {
	if len(s) > n {
		return s[:n] + "..."
	}
	return s
}

func contentLength(h textproto.MIMEHeader) (int, bool) {
	v := h.Get("Content-Length")
	if v == "" {
		return 0, false
	}
	n, err := strconv.Atoi(v)
	if err != nil || n < 0 {
		return 0, false
	}
	return n, true
}

// skipToDelimiter discards bytes up to and including the next delimiter
// line; io.EOF when the stream ends first or at a close delimiter.
func (p *PartReader) skipToDelimiter() error {
	lineStart := true
	for {
		if lineStart {
			found, closing, err := p.atDelimiter()
			if err != nil {
				return err
			}
			if found {
				if closing {
					p.done = true
					return io.EOF
				}
				return nil
			}
		}
		_, err := p.r.ReadSlice('\n')
		switch {
		case err == nil:
			lineStart = true
		case errors.Is(err, bufio.ErrBufferFull):
			lineStart = false
		default:
			return err
		}
	}
}

// readToDelimiter collects the body up to the line break before the next
// delimiter line. Delimiters count only at the start of a line.
func (p *PartReader) readToDelimiter() ([]byte, error) {
	var body []byte
	lineStart := true
	for {
		if lineStart {
			found, closing, err := p.atDelimiter()
			if err != nil {
				return nil, unexpected(err)
			}
			if found {
				if closing {
					p.done = true
				}
				// The line break before the delimiter belongs to it
				// (RFC 2046 section 5.1.1).
				body = bytes.TrimSuffix(body, []byte("\n"))
				body = bytes.TrimSuffix(body, []byte("\r"))
				return body, nil
			}
		}
		line, err := p.r.ReadSlice('\n')
		if len(body)+len(line) > p.maxPart+2 {
			if err := p.skipToDelimiter(); err != nil && !errors.Is(err, io.EOF) {
				return nil, err
			}
			return nil, ErrPartTooLarge
		}
		body = append(body, line...)
		switch {
		case err == nil:
			lineStart = true
		case errors.Is(err, bufio.ErrBufferFull):
			lineStart = false
		default:
			return nil, unexpected(err)
		}
	}
}
