package fits

import (
	"bufio"
	"encoding/binary"
	"fmt"
	"io"
	"math"
)

// WriteUint16 writes planes of w x h unsigned 16-bit values as a primary
// image (BITPIX = 16 with BZERO = 32768, the unsigned convention of section
// 5.2.5), NAXIS = 2 for one plane, 3 for several. Values are rounded and
// clipped to 0..65535; NaN is written as 0 (this writer has no BLANK).
func WriteUint16(w io.Writer, width, height int, planes ...[]float32) error {
	if width <= 0 || height <= 0 || len(planes) == 0 {
		return fmt.Errorf("frames: fits: nothing to write (%dx%d, %d planes)", width, height, len(planes))
	}
	bw := bufio.NewWriter(w)
	cards := []string{
		fmt.Sprintf("%-8s= %20s / %s", "SIMPLE", "T", "conforms to FITS Standard 4.0"),
		fmt.Sprintf("%-8s= %20d / %s", "BITPIX", 16, "16-bit integers"),
	}
	if len(planes) == 1 {
		cards = append(cards, fmt.Sprintf("%-8s= %20d", "NAXIS", 2))
	} else {
		cards = append(cards, fmt.Sprintf("%-8s= %20d", "NAXIS", 3))
	}
	cards = append(cards, fmt.Sprintf("%-8s= %20d", "NAXIS1", width), fmt.Sprintf("%-8s= %20d", "NAXIS2", height))
	if len(planes) > 1 {
		cards = append(cards, fmt.Sprintf("%-8s= %20d", "NAXIS3", len(planes)))
	}
	cards = append(cards,
		fmt.Sprintf("%-8s= %20s / %s", "BZERO", "32768", "unsigned 16-bit convention"),
		fmt.Sprintf("%-8s= %20s", "BSCALE", "1"), "END")
	n := 0
	for _, c := range cards {
		fmt.Fprintf(bw, "%-80s", c)
		n += CardSize
	}
	for ; n%BlockSize != 0; n++ {
		bw.WriteByte(' ')
	}
	var b [2]byte
	for _, p := range planes {
		if len(p) < width*height {
			return fmt.Errorf("frames: fits: plane has %d values, want %d", len(p), width*height)
		}
		for _, v := range p[:width*height] {
			u := uint16(0)
			if !math.IsNaN(float64(v)) {
				u = uint16(math.Round(math.Min(math.Max(float64(v), 0), 65535)))
			}
			binary.BigEndian.PutUint16(b[:], u^0x8000)
			bw.Write(b[:])
			n += 2
		}
	}
	for ; n%BlockSize != 0; n++ {
		bw.WriteByte(0)
	}
	return bw.Flush()
}
