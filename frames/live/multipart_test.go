package live

import (
	"bytes"
	"errors"
	"fmt"
	"io"
	"strings"
	"testing"
	"time"
)

// readAll collects every part body and the error that ended the stream.
func readAll(r io.Reader, boundary string, maxPart int) ([]string, int, error) {
	pr := NewPartReader(r, boundary, maxPart)
	var parts []string
	tooLarge := 0
	for range 1000 {
		p, err := pr.Next()
		if errors.Is(err, ErrPartTooLarge) {
			tooLarge++
			continue
		}
		if err != nil {
			return parts, tooLarge, err
		}
		parts = append(parts, string(p.Body))
	}
	return parts, tooLarge, errors.New("no end after 1000 parts")
}

// encodeParts writes parts the way RFC 2046 section 5.1.1 describes
// (delimiter "--" + boundary on its own line, CRLF before it), with or
// without Content-Length, and the close delimiter when closed.
func encodeParts(boundary string, parts []string, withLength, closed bool) string {
	var b strings.Builder
	for _, p := range parts {
		fmt.Fprintf(&b, "--%s\r\nContent-Type: image/jpeg\r\n", boundary)
		if withLength {
			fmt.Fprintf(&b, "Content-Length: %d\r\n", len(p))
		}
		fmt.Fprintf(&b, "\r\n%s\r\n", p)
	}
	if closed {
		fmt.Fprintf(&b, "--%s--\r\n", boundary)
	}
	return b.String()
}

func TestPartReader(t *testing.T) {
	for _, tc := range []struct {
		name     string
		boundary string
		stream   string
		max      int
		want     []string
		tooLarge int
		err      error // nil means io.EOF
	}{
		{"WithLength", "b", encodeParts("b", []string{"one", "two\r\n--b\r\n", ""}, true, true), 100, []string{"one", "two\r\n--b\r\n", ""}, 0, nil},
		{"NoLength", "b", encodeParts("b", []string{"one", "two\nlines", ""}, false, true), 100, []string{"one", "two\nlines", ""}, 0, nil},
		{"NoCloseDelimiter", "b", encodeParts("b", []string{"x", "y"}, true, false), 100, []string{"x", "y"}, 0, nil},
		{"Preamble", "b", "garbage before\r\n" + encodeParts("b", []string{"x"}, false, true), 100, []string{"x"}, 0, nil},
		{"LFOnly", "b", "--b\nContent-Type: image/jpeg\n\nabc\n--b\n\ndef\n--b--\n", 100, []string{"abc", "def"}, 0, nil},
		// Some cameras put the leading dashes into the boundary parameter.
		{"DashesInParameter", "--myb", "--myb\r\n\r\nA\r\n--myb\r\n\r\nB\r\n--myb--", 100, []string{"A", "B"}, 0, nil},
		{"NoGapAfterCountedBody", "b", "--b\r\nContent-Length: 3\r\n\r\nabc--b\r\nContent-Length: 1\r\n\r\nd--b--", 100, []string{"abc", "d"}, 0, nil},
		{"TooLargeCounted", "b", encodeParts("b", []string{"small", strings.Repeat("x", 50), "ok"}, true, true), 10, []string{"small", "ok"}, 1, nil},
		{"TooLargeUncounted", "b", encodeParts("b", []string{"small", strings.Repeat("x\n", 50), "ok"}, false, true), 10, []string{"small", "ok"}, 1, nil},
		{"CutInsideCounted", "b", "--b\r\nContent-Length: 10\r\n\r\nabc", 100, nil, 0, io.ErrUnexpectedEOF},
		{"CutInsideUncounted", "b", "--b\r\n\r\nabc\r\nmore", 100, nil, 0, io.ErrUnexpectedEOF},
		{"CutInHeader", "b", "--b\r\nContent-Type: ima", 100, nil, 0, io.ErrUnexpectedEOF},
		{"Empty", "b", "", 100, nil, 0, nil},
		{"BoundaryMidLineIsData", "b", "--b\r\n\r\nx --b y\r\n--b--", 100, []string{"x --b y"}, 0, nil},
	} {
		t.Run(tc.name, func(t *testing.T) {
			got, tooLarge, err := readAll(strings.NewReader(tc.stream), tc.boundary, tc.max)
			want := tc.err
			if want == nil {
				want = io.EOF
			}
			if !errors.Is(err, want) {
				t.Errorf("ended with %v, want %v", err, want)
			}
			if fmt.Sprintf("%q", got) != fmt.Sprintf("%q", tc.want) {
				t.Errorf("parts %q, want %q", got, tc.want)
			}
			if tooLarge != tc.tooLarge {
				t.Errorf("%d parts too large, want %d", tooLarge, tc.tooLarge)
			}
		})
	}
}

func TestPartReaderBadHeader(t *testing.T) {
	_, _, err := readAll(strings.NewReader("--b\r\nno colon here\r\n\r\nx\r\n--b--"), "b", 100)
	if err == nil || errors.Is(err, io.EOF) || !strings.Contains(err.Error(), "no colon") {
		t.Fatalf("got %v, want a header error", err)
	}
	many := "--b\r\n" + strings.Repeat("X: y\r\n", 40) + "\r\nx\r\n--b--"
	if _, _, err := readAll(strings.NewReader(many), "b", 100); err == nil || errors.Is(err, io.EOF) {
		t.Fatalf("40 header lines: got %v, want an error", err)
	}
}

func TestBoundaryOf(t *testing.T) {
	for _, tc := range []struct {
		ct, want string
		ok       bool
	}{
		{"multipart/x-mixed-replace; boundary=frame", "frame", true},
		{`multipart/x-mixed-replace;boundary="--a b"`, "--a b", true},
		{"multipart/x-mixed-replace", "", false},
		{"image/jpeg", "", false},
		{"multipart/x-mixed-replace; boundary=" + strings.Repeat("a", 201), "", false},
	} {
		got, err := BoundaryOf(tc.ct)
		if (err == nil) != tc.ok || got != tc.want {
			t.Errorf("BoundaryOf(%q) = %q, %v", tc.ct, got, err)
		}
	}
}

// FuzzPartReader feeds arbitrary streams: the reader must end without
// panicking, within a bounded number of parts, and never return a part
// over its limit.
func FuzzPartReader(f *testing.F) {
	f.Add([]byte(encodeParts("b", []string{"one", "two"}, true, true)), "b")
	f.Add([]byte(encodeParts("b", []string{"one", "two"}, false, false)), "b")
	f.Add([]byte("--b\r\nContent-Length: 99999999999999999999\r\n\r\nx"), "b")
	f.Add([]byte("--b\r\nContent-Length: -5\r\n\r\nx\r\n--b--"), "b")
	f.Add([]byte("--\r\n\r\n--\r\n"), "")
	f.Fuzz(func(t *testing.T, data []byte, boundary string) {
		const maxPart = 1 << 10
		pr := NewPartReader(bytes.NewReader(data), boundary, maxPart)
		for n := 0; ; n++ {
			if n > len(data)+2 {
				t.Fatalf("%d parts from %d bytes", n, len(data))
			}
			p, err := pr.Next()
			if errors.Is(err, ErrPartTooLarge) {
				continue
			}
			if err != nil {
				return
			}
			if len(p.Body) > maxPart {
				t.Fatalf("part of %d bytes over the %d limit", len(p.Body), maxPart)
			}
		}
	})
}

// FuzzPartRoundTrip encodes fuzzed payloads with Content-Length (any bytes
// allowed) and checks that the reader gives them back unchanged.
func FuzzPartRoundTrip(f *testing.F) {
	f.Add([]byte("a\x00b\r\n--b\r\n\x00\x00c"), "b")
	f.Add([]byte{0xFF, 0xD8, 0xFF, 0x00, 0xFF, 0xD9}, "frame")
	f.Fuzz(func(t *testing.T, data []byte, boundary string) {
		if boundary == "" || strings.ContainsAny(boundary, "\r\n") || len(boundary) > 70 {
			return
		}
		parts := strings.Split(string(data), "\x00")
		if len(parts) > 16 {
			parts = parts[:16]
		}
		got, tooLarge, err := readAll(strings.NewReader(encodeParts(boundary, parts, true, true)), boundary, 1<<16)
		if !errors.Is(err, io.EOF) || tooLarge != 0 {
			t.Fatalf("ended with %v, %d too large", err, tooLarge)
		}
		if fmt.Sprintf("%q", got) != fmt.Sprintf("%q", parts) {
			t.Fatalf("parts %q, want %q", got, parts)
		}
	})
}

// TestPartReaderNoLookaheadWait: a camera that pauses right after a
// delimiter line (LF only, no Content-Length) must not hold back the part
// before it until the next frame comes.
func TestPartReaderNoLookaheadWait(t *testing.T) {
	pr, pw := io.Pipe()
	defer pw.Close()
	go pw.Write([]byte("--b\r\n\r\nabc\r\n--b\n"))
	got := make(chan string, 1)
	go func() {
		p, err := NewPartReader(pr, "b", 100).Next()
		if err != nil {
			got <- err.Error()
			return
		}
		got <- string(p.Body)
	}()
	select {
	case s := <-got:
		if s != "abc" {
			t.Errorf("part %q, want abc", s)
		}
	case <-time.After(5 * time.Second):
		t.Fatal("the part was held back waiting for more bytes")
	}
}
