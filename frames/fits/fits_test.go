package fits

import (
	"bytes"
	"encoding/binary"
	"errors"
	"fmt"
	"math"
	"strings"
	"testing"
)

// card formats one 80-character header card in the fixed format of the
// FITS Standard 4.0, section 4.2: keyword in columns 1-8, "= " in 9-10, a
// number or logical right-justified to column 30, then an optional comment.
func card(kw string, v any, comment string) string {
	var val string
	switch x := v.(type) {
	case bool:
		val = "F"
		if x {
			val = "T"
		}
		val = fmt.Sprintf("%20s", val)
	case int:
		val = fmt.Sprintf("%20d", x)
	case float64:
		val = fmt.Sprintf("%20s", strings.ToUpper(fmt.Sprintf("%G", x)))
	case string:
		val = fmt.Sprintf("%-20s", "'"+strings.ReplaceAll(x, "'", "''")+"'")
	case nil:
		return fmt.Sprintf("%-80s", kw)
	}
	s := fmt.Sprintf("%-8s= %s", kw, val)
	if comment != "" {
		s += " / " + comment
	}
	if len(s) > 80 {
		panic("card too long: " + s)
	}
	return fmt.Sprintf("%-80s", s)
}

// build makes a FITS file: the cards, END, space padding to a 2880-byte
// block (section 4.4.1), the big-endian data (section 5), and zero padding
// of the data to a block (section 3.3.2).
func build(cards []string, data []byte) []byte {
	var b bytes.Buffer
	for _, c := range cards {
		b.WriteString(c)
	}
	b.WriteString(card("END", nil, ""))
	for b.Len()%BlockSize != 0 {
		b.WriteByte(' ')
	}
	b.Write(data)
	for b.Len()%BlockSize != 0 {
		b.WriteByte(0)
	}
	return b.Bytes()
}

func mandatory(bitpix int, axes ...int) []string {
	c := []string{card("SIMPLE", true, "conforms to FITS standard"), card("BITPIX", bitpix, ""), card("NAXIS", len(axes), "")}
	for i, a := range axes {
		c = append(c, card(fmt.Sprintf("NAXIS%d", i+1), a, ""))
	}
	return c
}

func be(vals ...any) []byte {
	var b bytes.Buffer
	for _, v := range vals {
		binary.Write(&b, binary.BigEndian, v)
	}
	return b.Bytes()
}

func mustOpen(t *testing.T, file []byte) *File {
	t.Helper()
	f, err := Open(bytes.NewReader(file), int64(len(file)), 0)
	if err != nil {
		t.Fatalf("Open: %v", err)
	}
	return f
}

func readAll(t *testing.T, f *File, p int) []float32 {
	t.Helper()
	dst := make([]float32, f.Width*f.Height)
	n, err := f.ReadPlane(p, dst)
	if err != nil {
		t.Fatalf("ReadPlane(%d): %v", p, err)
	}
	if n != f.PlaneBytes() {
		t.Fatalf("ReadPlane read %d bytes, want %d", n, f.PlaneBytes())
	}
	return dst
}

func same(a, b float32) bool {
	if math.IsNaN(float64(a)) || math.IsNaN(float64(b)) {
		return math.IsNaN(float64(a)) && math.IsNaN(float64(b))
	}
	return a == b
}

// TestDecodeByStandard builds files byte by byte per FITS Standard 4.0 and
// checks the physical values: physical = BZERO + BSCALE * stored
// (section 4.4.2.5, eq. 3), BLANK marks undefined integers (section
// 4.4.2.5), IEEE NaN marks undefined reals (section 5.3), and BZERO = 32768
// with BITPIX = 16 stores unsigned 16-bit integers (section 5.2.5, table 11).
func TestDecodeByStandard(t *testing.T) {
	nan := float32(math.NaN())
	tests := []struct {
		name  string
		cards []string
		data  []byte
		want  []float32
	}{
		{"BITPIX8", mandatory(8, 3, 1), []byte{0, 7, 255}, []float32{0, 7, 255}},
		{"BITPIX8Blank", append(mandatory(8, 2, 1), card("BLANK", 255, "undefined")), []byte{3, 255}, []float32{3, nan}},
		{"BITPIX16Signed", mandatory(16, 3, 1), be(int16(-32768), int16(-1), int16(32767)), []float32{-32768, -1, 32767}},
		{"BITPIX16Unsigned", append(mandatory(16, 3, 1), card("BZERO", 32768.0, "unsigned"), card("BSCALE", 1.0, "")),
			be(int16(-32768), int16(0), int16(32767)), []float32{0, 32768, 65535}},
		{"BITPIX16ScaleBlank", append(mandatory(16, 2, 2), card("BSCALE", 2.0, ""), card("BZERO", 10.0, ""), card("BLANK", -1, "")),
			be(int16(5), int16(-1), int16(0), int16(-3)), []float32{20, nan, 10, 4}},
		{"BITPIX32", append(mandatory(32, 2, 1), card("BSCALE", 0.5, "")), be(int32(-7), int32(1<<30)), []float32{-3.5, 1 << 29}},
		{"BITPIX64", mandatory(64, 2, 1), be(int64(-5), int64(1<<40)), []float32{-5, 1 << 40}},
		{"BITPIXm32NaN", mandatory(-32, 3, 1), be(float32(1.5), float32(math.NaN()), float32(-2.25)), []float32{1.5, nan, -2.25}},
		{"BITPIXm32Scaled", append(mandatory(-32, 2, 1), card("BZERO", 100.0, ""), card("BSCALE", 2.0, "")), be(float32(1.5), float32(-1)), []float32{103, 98}},
		{"BITPIXm64", mandatory(-64, 2, 1), be(1.0/3, math.Inf(1)), []float32{float32(1.0 / 3), nan}},
		{"BlankIgnoredForReals", append(mandatory(-32, 1, 1), card("BLANK", 0, "not allowed for reals")), be(float32(0)), []float32{0}},
		{"DExponentAndStrings", append(mandatory(16, 1, 1),
			card("OBJECT", "it's a star", "quote doubled"), card("BSCALE", 1.0, ""), "BZERO   =               1.0D+1 / Fortran exponent                               "),
			be(int16(2)), []float32{12}},
		{"NAXIS4TrailingOne", mandatory(8, 2, 1, 1, 1), []byte{1, 2}, []float32{1, 2}},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			file := build(tc.cards, tc.data)
			if len(file)%BlockSize != 0 {
				t.Fatalf("test file is %d bytes", len(file))
			}
			f := mustOpen(t, file)
			got := readAll(t, f, 0)
			if len(got) != len(tc.want) {
				t.Fatalf("got %d pixels, want %d", len(got), len(tc.want))
			}
			for i := range got {
				if !same(got[i], tc.want[i]) {
					t.Errorf("pixel %d = %v, want %v", i, got[i], tc.want[i])
				}
			}
		})
	}
}

func TestCubePlanesAndHeader(t *testing.T) {
	data := be(int16(1), int16(2), int16(3), int16(4), int16(5), int16(6), int16(7), int16(8), int16(9), int16(10), int16(11), int16(12))
	file := build(append(mandatory(16, 3, 2, 2), card("OBJECT", "M31 'core'", "")), data)
	f := mustOpen(t, file)
	if f.Width != 3 || f.Height != 2 || f.Planes != 2 {
		t.Fatalf("size %dx%dx%d, want 3x2x2", f.Width, f.Height, f.Planes)
	}
	if v, _ := f.Get("OBJECT"); v != "M31 'core'" {
		t.Errorf("OBJECT = %q", v)
	}
	if f.HeaderBytes() != BlockSize {
		t.Errorf("header %d bytes", f.HeaderBytes())
	}
	p1 := readAll(t, f, 1)
	for i, v := range p1 {
		if v != float32(7+i) {
			t.Errorf("plane 1 pixel %d = %v, want %d", i, v, 7+i)
		}
	}
	if _, err := f.ReadPlane(2, p1); err == nil {
		t.Error("plane 2 of 2 read without error")
	}
}

func TestReadPixelsReadsOnlyRequested(t *testing.T) {
	const w, h = 50, 40
	vals := make([]any, 0, w*h)
	for i := 0; i < w*h; i++ {
		vals = append(vals, float32(i)*0.5)
	}
	f := mustOpen(t, build(mandatory(-32, w, h), be(vals...)))
	full := readAll(t, f, 0)
	idx := []int32{0, 1, 2, 3, 100, 1999, 7, 8, 500}
	dst := make([]float32, len(idx))
	n, err := f.ReadPixels(0, idx, dst)
	if err != nil {
		t.Fatal(err)
	}
	for k, i := range idx {
		if dst[k] != full[i] {
			t.Errorf("pixel %d = %v, want %v", i, dst[k], full[i])
		}
	}
	if want := int64(len(idx) * 4); n != want {
		t.Errorf("read %d bytes for %d pixels, want exactly %d", n, len(idx), want)
	}
	// Merging gaps reads through them: more bytes, same values.
	f.MergeGap = 4 * 500
	n2, err := f.ReadPixels(0, idx, dst)
	if err != nil {
		t.Fatal(err)
	}
	for k, i := range idx {
		if dst[k] != full[i] {
			t.Errorf("merged: pixel %d = %v, want %v", i, dst[k], full[i])
		}
	}
	if n2 <= n {
		t.Errorf("merged read %d bytes, expected more than %d", n2, n)
	}
	if _, err := f.ReadPixels(0, []int32{w * h}, dst); err == nil {
		t.Error("out-of-range pixel read without error")
	}
}

func TestBadFiles(t *testing.T) {
	good := build(mandatory(16, 4, 4), make([]byte, 32))
	noEnd := []byte(strings.Repeat(card("COMMENT", nil, ""), 36))
	tests := []struct {
		name string
		file []byte
		want string
	}{
		{"Empty", nil, "empty file"},
		{"ShortBlock", good[:1000], "shorter than one 2880-byte block"},
		{"WrongBlockSize", good[:len(good)-1], "not a whole number of 2880-byte blocks"},
		{"WrongBlockSizeLonger", append(append([]byte{}, good...), 0, 0), "not a whole number of 2880-byte blocks"},
		{"TruncatedData", build(mandatory(16, 100, 100), nil), "truncated"},
		{"NoSIMPLE", build(mandatory(16, 2, 2)[1:], nil), "card 1 must be SIMPLE"},
		{"NoEND", noEnd, "no END"},
		{"BadBITPIX", build(mandatory(12, 2, 2), make([]byte, 8)), "BITPIX = 12"},
		{"NAXIS0", build(mandatory(8), nil), "NAXIS = 0"},
		{"NAXIS1", build(mandatory(8, 5), []byte{1, 2, 3, 4, 5}), "1-D"},
		{"ZeroAxis", build(mandatory(8, 0, 5), nil), "no pixels"},
		{"NonASCII", append([]byte("SIMPLE  = \x01"), good[11:]...), "not printable ASCII"},
		{"NotFITS", append([]byte("hello world"), make([]byte, BlockSize)...), "not printable ASCII"},
		{"SimpleF", build(append([]string{card("SIMPLE", false, "")}, mandatory(8, 1, 1)[1:]...), []byte{0}), "SIMPLE = F"},
		{"Groups", build(append(mandatory(8, 0, 2), card("GROUPS", true, "")), nil), "random groups"},
		{"GarbageAfterEND", append(append([]byte{}, good[:BlockSize-80]...), append([]byte("X"), good[BlockSize-79:]...)...), "after END"},
		{"BadInteger", build([]string{card("SIMPLE", true, ""), card("BITPIX", "16", ""), card("NAXIS", 0, "")}, nil), "not an integer"},
		{"BSCALE0", build(append(mandatory(8, 1, 1), card("BSCALE", 0.0, "")), []byte{1}), "BSCALE = 0"},
		{"Huge", build(mandatory(8, 1<<20, 1<<20), nil), "limit"},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			_, err := Open(bytes.NewReader(tc.file), int64(len(tc.file)), 64<<20)
			if err == nil {
				t.Fatal("opened without error")
			}
			if !strings.Contains(err.Error(), tc.want) || !strings.HasPrefix(err.Error(), "frames: fits:") {
				t.Fatalf("error %q, want it to contain %q and start with \"frames: fits:\"", err, tc.want)
			}
			var fe FormatError
			var ue UnsupportedError
			var te *TooLargeError
			if !errors.As(err, &fe) && !errors.As(err, &ue) && !errors.As(err, &te) {
				t.Errorf("error %T is not one of the named error types", err)
			}
		})
	}
}

func TestWriteUint16RoundTrip(t *testing.T) {
	a := []float32{0, 1, 65535, 32768, 40000.4, 7}
	b := []float32{9, 8, 7, 6, 5, 4}
	var buf bytes.Buffer
	if err := WriteUint16(&buf, 3, 2, a, b); err != nil {
		t.Fatal(err)
	}
	if buf.Len()%BlockSize != 0 {
		t.Fatalf("%d bytes is not whole blocks", buf.Len())
	}
	f := mustOpen(t, buf.Bytes())
	if f.Planes != 2 || f.Width != 3 || f.Height != 2 {
		t.Fatalf("%dx%dx%d", f.Width, f.Height, f.Planes)
	}
	got := readAll(t, f, 0)
	want := []float32{0, 1, 65535, 32768, 40000, 7}
	for i := range want {
		if got[i] != want[i] {
			t.Errorf("pixel %d = %v, want %v", i, got[i], want[i])
		}
	}
	if got := readAll(t, f, 1); got[5] != 4 {
		t.Errorf("plane 1 last pixel %v", got[5])
	}
}
