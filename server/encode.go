package server

import (
	"bytes"
	"encoding/binary"
	"image"
	"image/jpeg"
	"image/png"
	"math"
	"math/bits"
)

// Binary message kinds and limits of the websocket protocol (DEVELOPERS.md).
const (
	msgFrame   = 1
	msgPreview = 2
	msgHeat    = 3

	maskEncBitset = 0
	maskEncList   = 1

	// maxMaskBytes is the budget of the read mask in one frame update; with
	// maxPreviewBytes and the header it keeps a frame's traffic under 64 KB.
	maxMaskBytes    = 48 << 10
	maxPreviewBytes = 15000
	maxMsgRegions   = 64
	previewSide     = 256 // longest side of a preview image, pixels
	heatSide        = 256 // longest side of a heat image, cells

	frameHeaderLen = 25
)

// Wire states of a frame update.
const (
	wireLearning = 0
	wireWatching = 1
	wireAlarm    = 2
	wireFinished = 3
)

// box is an alarm region in source pixels, inclusive.
type box struct {
	X0, Y0, X1, Y1 int
	Peak           float64
}

// maskEncoder turns the streams read at one frame into the smallest mask
// encoding that fits maxMaskBytes. One goroutine owns it; its scratch
// buffers are reused across frames.
type maskEncoder struct {
	gw, gh int
	cells  []uint64
	list   []byte
}

func newMaskEncoder(gw, gh int) *maskEncoder { return &maskEncoder{gw: gw, gh: gh} }

// encode appends to dst a full kind-1 frame update and returns it.
func (me *maskEncoder) encode(dst []byte, state uint8, frame int, g, limit float64, read []int32, regions []box) []byte {
	scale, mw, mh, enc, mask := me.mask(read)
	dst = append(dst, msgFrame, state)
	dst = binary.LittleEndian.AppendUint16(dst, uint16(scale))
	dst = binary.LittleEndian.AppendUint32(dst, uint32(frame))
	dst = binary.LittleEndian.AppendUint32(dst, math.Float32bits(float32(g)))
	dst = binary.LittleEndian.AppendUint32(dst, math.Float32bits(float32(limit)))
	dst = binary.LittleEndian.AppendUint16(dst, uint16(mw))
	dst = binary.LittleEndian.AppendUint16(dst, uint16(mh))
	dst = append(dst, enc)
	dst = binary.LittleEndian.AppendUint32(dst, uint32(len(mask)))
	dst = append(dst, mask...)
	n := min(len(regions), maxMsgRegions)
	dst = binary.LittleEndian.AppendUint16(dst, uint16(n))
	for _, r := range regions[:n] {
		for _, v := range [4]int{r.X0, r.Y0, r.X1, r.Y1} {
			dst = binary.LittleEndian.AppendUint16(dst, uint16(min(max(v, 0), math.MaxUint16)))
		}
		dst = binary.LittleEndian.AppendUint32(dst, math.Float32bits(float32(r.Peak)))
	}
	return dst
}

// mask picks the finest scale s in {1,2,4,...} whose encoding fits
// maxMaskBytes (coarser scales mark a cell when any stream in it was read)
// and returns the scale, mask size, encoding and bytes (scratch memory).
func (me *maskEncoder) mask(read []int32) (scale, mw, mh int, enc uint8, out []byte) {
	for s := 1; ; s *= 2 {
		mw, mh = (me.gw+s-1)/s, (me.gh+s-1)/s
		words := (mw*mh + 63) / 64
		if cap(me.cells) < words {
			me.cells = make([]uint64, words)
		}
		cells := me.cells[:words]
		clear(cells)
		for _, i := range read {
			x, y := int(i)%me.gw, int(i)/me.gw
			c := (y/s)*mw + x/s
			cells[c>>6] |= 1 << (uint(c) & 63)
		}
		bitsetLen := (mw*mh + 7) / 8
		// Delta-varint list of the marked cells, ascending.
		list := me.list[:0]
		prev := 0
		for wi, w := range cells {
			for w != 0 {
				c := wi*64 + bits.TrailingZeros64(w)
				list = binary.AppendUvarint(list, uint64(c-prev))
				prev = c
				w &= w - 1
			}
			if len(list) > bitsetLen && len(list) > maxMaskBytes {
				break // the bitset wins or neither fits; stop early
			}
		}
		me.list = list
		if len(list) <= bitsetLen && len(list) <= maxMaskBytes {
			return s, mw, mh, maskEncList, list
		}
		if bitsetLen <= maxMaskBytes || (mw == 1 && mh == 1) {
			b := me.list[:0]
			for wi := 0; wi < bitsetLen; wi++ {
				b = append(b, byte(cells[wi/8]>>(uint(wi%8)*8)))
			}
			me.list = b
			return s, mw, mh, maskEncBitset, b
		}
	}
}

// gridImage is a frame of float32 values, the server's view of a frame.
type gridImage struct {
	W, H, Stride int
	Pix          []float32 // Pix[y*Stride+x]; NaN = missing
}

// encodePreview returns a kind-2 message holding a downsampled grey preview
// of img (box means, stretched between its minimum and maximum), PNG when it
// fits maxPreviewBytes, else JPEG at falling quality and size.
func encodePreview(frame int, img gridImage) []byte {
	side := previewSide
	for {
		g := downsampleGray(img, side)
		var buf bytes.Buffer
		format := byte(0)
		if err := png.Encode(&buf, g); err != nil || buf.Len() > maxPreviewBytes {
			format = 1
			for _, q := range []int{80, 60, 40} {
				buf.Reset()
				if jpeg.Encode(&buf, g, &jpeg.Options{Quality: q}) == nil && buf.Len() <= maxPreviewBytes {
					break
				}
			}
		}
		if buf.Len() <= maxPreviewBytes || side <= 16 {
			out := make([]byte, 0, 8+buf.Len())
			out = append(out, msgPreview, format, 0, 0)
			out = binary.LittleEndian.AppendUint32(out, uint32(frame))
			return append(out, buf.Bytes()...)
		}
		side /= 2
	}
}

// downsampleGray box-averages img to at most side pixels on its longer side
// and stretches the result to 0..255.
func downsampleGray(img gridImage, side int) *image.Gray {
	f := max((img.W+side-1)/side, (img.H+side-1)/side, 1)
	w, h := (img.W+f-1)/f, (img.H+f-1)/f
	sum := make([]float32, w*h)
	cnt := make([]float32, w*h)
	for y := 0; y < img.H; y++ {
		row := img.Pix[y*img.Stride : y*img.Stride+img.W]
		o := (y / f) * w
		for x, v := range row {
			if v == v { // not NaN
				sum[o+x/f] += v
				cnt[o+x/f]++
			}
		}
	}
	lo, hi := float32(math.Inf(1)), float32(math.Inf(-1))
	for i := range sum {
		if cnt[i] > 0 {
			sum[i] /= cnt[i]
			lo, hi = min(lo, sum[i]), max(hi, sum[i])
		}
	}
	g := image.NewGray(image.Rect(0, 0, w, h))
	k := float32(0)
	if hi > lo {
		k = 255 / (hi - lo)
	}
	for i := range sum {
		if cnt[i] > 0 {
			g.Pix[i] = uint8(min((sum[i]-lo)*k+0.5, 255))
		}
	}
	return g
}

// encodeHeat returns a kind-3 message: the local statistics of a gw x gh
// grid, max-pooled to at most heatSide cells a side, as L/limit*255.
func encodeHeat(frame int, local []float32, gw, gh int, limit float64) []byte {
	f := max((gw+heatSide-1)/heatSide, (gh+heatSide-1)/heatSide, 1)
	w, h := (gw+f-1)/f, (gh+f-1)/f
	out := make([]byte, 12+w*h)
	out[0] = msgHeat
	binary.LittleEndian.PutUint32(out[4:], uint32(frame))
	binary.LittleEndian.PutUint16(out[8:], uint16(w))
	binary.LittleEndian.PutUint16(out[10:], uint16(h))
	cells := out[12:]
	k := float32(0)
	if limit > 0 {
		k = float32(255 / limit)
	}
	for y := 0; y < gh; y++ {
		o := (y / f) * w
		for x, l := range local[y*gw : y*gw+gw] {
			v := uint8(min(max(l*k, 0), 255))
			if v > cells[o+x/f] {
				cells[o+x/f] = v
			}
		}
	}
	return out
}
