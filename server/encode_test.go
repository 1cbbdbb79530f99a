package server

import (
	"bytes"
	"encoding/binary"
	"image/jpeg"
	"image/png"
	"math"
	"math/rand/v2"
	"testing"
)

// decodedFrame is a kind-1 message read back by an independent decoder
// written from the protocol text in DEVELOPERS.md.
type decodedFrame struct {
	state        uint8
	scale        int
	frame        uint32
	g, limit     float32
	mw, mh       int
	cells        []bool // by cell index
	marked       int
	regions      []box
	maskEncoding uint8
}

func decodeFrameMsg(t *testing.T, b []byte) decodedFrame {
	t.Helper()
	le := binary.LittleEndian
	if len(b) < frameHeaderLen || b[0] != msgFrame {
		t.Fatalf("not a frame update: %d bytes, kind %d", len(b), b[0])
	}
	d := decodedFrame{state: b[1], scale: int(le.Uint16(b[2:])), frame: le.Uint32(b[4:]),
		g: math.Float32frombits(le.Uint32(b[8:])), limit: math.Float32frombits(le.Uint32(b[12:])),
		mw: int(le.Uint16(b[16:])), mh: int(le.Uint16(b[18:])), maskEncoding: b[20]}
	d.cells = make([]bool, d.mw*d.mh)
	n := int(le.Uint32(b[21:]))
	mask := b[25 : 25+n]
	switch d.maskEncoding {
	case 0:
		for c := 0; c < d.mw*d.mh; c++ {
			if mask[c/8]&(1<<(c%8)) != 0 {
				d.cells[c] = true
				d.marked++
			}
		}
	case 1:
		c := 0
		for r := bytes.NewReader(mask); r.Len() > 0; {
			v, err := binary.ReadUvarint(r)
			if err != nil {
				t.Fatal(err)
			}
			c += int(v)
			if c >= len(d.cells) || (d.marked > 0 && v == 0) {
				t.Fatalf("list cell %d outside %d cells or repeated", c, len(d.cells))
			}
			d.cells[c] = true
			d.marked++
		}
	default:
		t.Fatalf("mask encoding %d", d.maskEncoding)
	}
	rest := b[25+n:]
	nr := int(le.Uint16(rest))
	rest = rest[2:]
	for i := 0; i < nr; i++ {
		r := rest[i*12:]
		d.regions = append(d.regions, box{int(le.Uint16(r)), int(le.Uint16(r[2:])), int(le.Uint16(r[4:])), int(le.Uint16(r[6:])), float64(math.Float32frombits(le.Uint32(r[8:])))})
	}
	if len(rest) != nr*12 {
		t.Fatalf("%d trailing bytes", len(rest)-nr*12)
	}
	return d
}

// readSets are stream sets of a 1024 x 1024 grid: a scattered 3% budget
// (the worst case for a list), every stream, and a compact block.
func readSets(gw, gh int) map[string][]int32 {
	m := gw * gh
	rng := rand.New(rand.NewPCG(1, 2))
	var scattered, all, block []int32
	for i := 0; i < m; i++ {
		all = append(all, int32(i))
		if rng.Float64() < 0.03 {
			scattered = append(scattered, int32(i))
		}
		if x, y := i%gw, i/gw; x < 64 && y < 64 {
			block = append(block, int32(i))
		}
	}
	// A 20% budget too: the list no longer fits at scale 1.
	var dense []int32
	for i := 0; i < m; i++ {
		if rng.Float64() < 0.2 {
			dense = append(dense, int32(i))
		}
	}
	return map[string][]int32{"scattered3pct": scattered, "dense20pct": dense, "all": all, "block": block}
}

func TestFrameMessageRoundTripAndSize(t *testing.T) {
	const gw, gh = 1024, 1024
	enc := newMaskEncoder(gw, gh)
	regions := make([]box, 100)
	for i := range regions {
		regions[i] = box{i, i + 1, i + 2, i + 3, float64(i) / 2}
	}
	for name, read := range readSets(gw, gh) {
		t.Run(name, func(t *testing.T) {
			msg := enc.encode(nil, wireAlarm, 1234567, 12.5, 9.75, read, regions)
			d := decodeFrameMsg(t, msg)
			if d.state != wireAlarm || d.frame != 1234567 || d.g != 12.5 || d.limit != 9.75 {
				t.Fatalf("header %+v", d)
			}
			if len(msg)-frameHeaderLen-2-12*len(d.regions) > maxMaskBytes {
				t.Fatalf("mask %d bytes > %d", len(msg), maxMaskBytes)
			}
			// Every read stream's cell is marked, and every marked cell holds a read stream.
			want := make([]bool, d.mw*d.mh)
			nwant := 0
			for _, i := range read {
				x, y := int(i)%gw/d.scale, int(i)/gw/d.scale
				if !want[y*d.mw+x] {
					nwant++
				}
				want[y*d.mw+x] = true
			}
			if nwant != d.marked {
				t.Fatalf("scale %d: %d cells marked, want %d", d.scale, d.marked, nwant)
			}
			for c, w := range want {
				if w && !d.cells[c] {
					t.Fatalf("cell %d not marked", c)
				}
			}
			// The scale is the finest that fits: at half the scale it would not.
			if d.scale > 1 {
				fine := newMaskEncoder(gw, gh)
				_, _, _, _, m := fine.mask(read)
				if len(m) > maxMaskBytes {
					t.Fatalf("chosen mask over budget")
				}
				s := d.scale / 2
				w := (gw + s - 1) / s
				if h := (gh + s - 1) / s; (w*h+7)/8 <= maxMaskBytes {
					t.Fatalf("scale %d chosen but the bitset at %d (%d bytes) fits", d.scale, s, (w*h+7)/8)
				}
			}
			if len(d.regions) != maxMsgRegions || d.regions[3] != regions[3] {
				t.Fatalf("regions: %d, first %+v", len(d.regions), d.regions[:1])
			}
			preview := encodePreview(1, noisyImage(gw, gh))
			total := len(msg) + len(preview)
			t.Logf("1024x1024 %s: scale %d enc %d, frame update %d B + preview %d B = %d B", name, d.scale, d.maskEncoding, len(msg), len(preview), total)
			if total > 64<<10 {
				t.Fatalf("frame traffic %d B > 64 KB", total)
			}
		})
	}
}

func noisyImage(w, h int) gridImage {
	rng := rand.New(rand.NewPCG(3, 4))
	img := gridImage{W: w, H: h, Stride: w, Pix: make([]float32, w*h)}
	for i := range img.Pix {
		img.Pix[i] = float32(rng.NormFloat64()*30 + 100)
	}
	return img
}

func TestPreviewDecodes(t *testing.T) {
	for _, img := range []gridImage{noisyImage(1024, 1024), noisyImage(37, 5), {W: 64, H: 64, Stride: 64, Pix: make([]float32, 64*64)}} {
		msg := encodePreview(7, img)
		if msg[0] != msgPreview || binary.LittleEndian.Uint32(msg[4:]) != 7 || len(msg) > maxPreviewBytes+8 {
			t.Fatalf("preview header %v, %d bytes", msg[:8], len(msg))
		}
		var w, h int
		switch msg[1] {
		case 0:
			m, err := png.Decode(bytes.NewReader(msg[8:]))
			if err != nil {
				t.Fatal(err)
			}
			w, h = m.Bounds().Dx(), m.Bounds().Dy()
		case 1:
			m, err := jpeg.Decode(bytes.NewReader(msg[8:]))
			if err != nil {
				t.Fatal(err)
			}
			w, h = m.Bounds().Dx(), m.Bounds().Dy()
		}
		if w > previewSide || h > previewSide || w < 1 || h < 1 {
			t.Fatalf("preview of %dx%d is %dx%d", img.W, img.H, w, h)
		}
		// Aspect ratio kept within one pixel of rounding.
		if math.Abs(float64(w)/float64(h)-float64(img.W)/float64(img.H)) > float64(img.W)/float64(img.H)/float64(h)+0.2 {
			t.Fatalf("aspect %dx%d -> %dx%d", img.W, img.H, w, h)
		}
	}
}

func TestHeat(t *testing.T) {
	gw, gh := 600, 3
	local := make([]float32, gw*gh)
	local[2*gw+599] = 20 // above the limit: clipped to 255
	local[0] = 5         // half the limit
	msg := encodeHeat(9, local, gw, gh, 10)
	w, h := int(binary.LittleEndian.Uint16(msg[8:])), int(binary.LittleEndian.Uint16(msg[10:]))
	if w != 200 || h != 1 || len(msg) != 12+w*h {
		t.Fatalf("heat %dx%d, %d bytes", w, h, len(msg))
	}
	cells := msg[12:]
	if cells[0] != 127 || cells[199] != 255 || cells[100] != 0 {
		t.Fatalf("cells %d %d %d, want 127 255 0", cells[0], cells[199], cells[100])
	}
}

func BenchmarkFrameEncode1024(b *testing.B) {
	read := readSets(1024, 1024)["scattered3pct"]
	enc := newMaskEncoder(1024, 1024)
	var buf []byte
	for b.Loop() {
		buf = enc.encode(buf[:0], wireWatching, 1, 1, 1, read, nil)
	}
	b.ReportMetric(float64(len(buf)), "bytes/msg")
}
