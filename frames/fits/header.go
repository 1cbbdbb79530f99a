// Package fits reads the primary image of a FITS file (Definition of the
// Flexible Image Transport System, FITS Standard 4.0, IAU FITS Working Group,
// 2016) and can read single pixels of it with ReadAt, so a caller reads only
// the pixels it needs.
package fits

import (
	"fmt"
	"math"
	"strconv"
	"strings"
)

// Sizes fixed by the standard (section 3.1 and 4.1.1).
const (
	BlockSize   = 2880 // bytes in a FITS block
	CardSize    = 80   // bytes in a header card (keyword record)
	cardsPerBlk = BlockSize / CardSize
	// maxHeaderBlocks bounds how far we look for END, so a file that is
	// not FITS (or has no END) cannot make us read without end.
	maxHeaderBlocks = 1000
)

// FormatError reports bytes that break the FITS standard.
type FormatError string

func (e FormatError) Error() string { return "frames: fits: " + string(e) }

// UnsupportedError reports a valid FITS feature this reader does not read.
type UnsupportedError string

func (e UnsupportedError) Error() string { return "frames: fits: unsupported: " + string(e) }

// Card is one parsed header card (keyword record).
type Card struct {
	Keyword string
	Value   string // raw value text, quotes removed for strings; "" if none
	IsStr   bool
}

// Header is the parsed primary header with the keywords that shape the data.
type Header struct {
	Cards    []Card
	Bitpix   int
	Naxis    []int64
	Bscale   float64
	Bzero    float64
	Blank    int64
	HasBlank bool
	// Bytes is the header's length on disk (whole blocks).
	Bytes int64
}

// Get returns the value of the first card with keyword k.
func (h *Header) Get(k string) (string, bool) {
	for _, c := range h.Cards {
		if c.Keyword == k {
			return c.Value, true
		}
	}
	return "", false
}

// parseHeader parses header blocks until the END card. read returns the
// next 2880-byte block, or an error.
func parseHeader(read func(block int) ([]byte, error)) (*Header, error) {
	h := &Header{Bscale: 1}
	ended := false
	for b := 0; !ended; b++ {
		if b == maxHeaderBlocks {
			return nil, FormatError(fmt.Sprintf("no END card in the first %d header blocks", maxHeaderBlocks))
		}
		blk, err := read(b)
		if err != nil {
			return nil, err
		}
		for c := 0; c < cardsPerBlk; c++ {
			raw := blk[c*CardSize : (c+1)*CardSize]
			n := b*cardsPerBlk + c
			if ended {
				// Section 4.4.1: after END the block is filled with spaces.
				if strings.TrimRight(string(raw), " ") != "" {
					return nil, FormatError(fmt.Sprintf("card %d after END is not blank", n+1))
				}
				continue
			}
			card, err := parseCard(raw, n)
			if err != nil {
				return nil, err
			}
			if card.Keyword == "END" {
				ended = true
				continue
			}
			h.Cards = append(h.Cards, card)
		}
		h.Bytes = int64(b+1) * BlockSize
	}
	if err := h.interpret(); err != nil {
		return nil, err
	}
	return h, nil
}

// parseCard splits one 80-byte card (section 4.1.2): keyword in bytes 1-8,
// value indicator "= " in bytes 9-10, value and comment after.
func parseCard(raw []byte, n int) (Card, error) {
	for i, ch := range raw {
		if ch < 0x20 || ch > 0x7e {
			return Card{}, FormatError(fmt.Sprintf("card %d byte %d is 0x%02x, not printable ASCII (section 4.1.1)", n+1, i+1, ch))
		}
	}
	kw := strings.TrimRight(string(raw[:8]), " ")
	for _, ch := range kw {
		if !(ch >= 'A' && ch <= 'Z' || ch >= '0' && ch <= '9' || ch == '-' || ch == '_') {
			return Card{}, FormatError(fmt.Sprintf("card %d keyword %q has a character outside A-Z 0-9 - _ (section 4.1.2.1)", n+1, kw))
		}
	}
	c := Card{Keyword: kw}
	if string(raw[8:10]) != "= " || kw == "COMMENT" || kw == "HISTORY" || kw == "" {
		return c, nil
	}
	v := strings.TrimLeft(string(raw[10:]), " ")
	if strings.HasPrefix(v, "'") {
		// Character string: a doubled quote stands for one (section 4.2.1).
		var sb strings.Builder
		i := 1
		for {
			if i >= len(v) {
				return Card{}, FormatError(fmt.Sprintf("card %d (%s): string value has no closing quote", n+1, kw))
			}
			if v[i] == '\'' {
				if i+1 < len(v) && v[i+1] == '\'' {
					sb.WriteByte('\'')
					i += 2
					continue
				}
				break
			}
			sb.WriteByte(v[i])
			i++
		}
		c.Value, c.IsStr = strings.TrimRight(sb.String(), " "), true
		return c, nil
	}
	if i := strings.IndexByte(v, '/'); i >= 0 {
		v = v[:i]
	}
	c.Value = strings.TrimSpace(v)
	return c, nil
}

func (c Card) int(n int) (int64, error) {
	v, err := strconv.ParseInt(strings.TrimPrefix(c.Value, "+"), 10, 64)
	if err != nil || c.IsStr {
		return 0, FormatError(fmt.Sprintf("card %d: %s = %q is not an integer", n+1, c.Keyword, c.Value))
	}
	return v, nil
}

func (c Card) float(n int) (float64, error) {
	// Fortran-style exponents use D (section 4.2.4).
	s := strings.NewReplacer("D", "E", "d", "e").Replace(c.Value)
	v, err := strconv.ParseFloat(s, 64)
	if err != nil || c.IsStr || math.IsNaN(v) || math.IsInf(v, 0) {
		return 0, FormatError(fmt.Sprintf("card %d: %s = %q is not a real number", n+1, c.Keyword, c.Value))
	}
	return v, nil
}

// interpret checks the mandatory keywords of a primary header in their
// required order (section 4.4.1.1: SIMPLE, BITPIX, NAXIS, NAXIS1..n) and
// reads BSCALE, BZERO and BLANK (section 4.4.2.5).
func (h *Header) interpret() error {
	cards := h.Cards
	need := func(i int, kw string) (Card, error) {
		if i >= len(cards) || cards[i].Keyword != kw {
			got := "nothing"
			if i < len(cards) {
				got = strconv.Quote(cards[i].Keyword)
			}
			return Card{}, FormatError(fmt.Sprintf("card %d must be %s, found %s (section 4.4.1.1)", i+1, kw, got))
		}
		return cards[i], nil
	}
	c, err := need(0, "SIMPLE")
	if err != nil {
		return err
	}
	if c.Value != "T" {
		return UnsupportedError("SIMPLE = " + c.Value + ": the file says it does not conform to the standard")
	}
	if c, err = need(1, "BITPIX"); err != nil {
		return err
	}
	bp, err := c.int(1)
	if err != nil {
		return err
	}
	switch bp {
	case 8, 16, 32, 64, -32, -64:
		h.Bitpix = int(bp)
	default:
		return FormatError(fmt.Sprintf("BITPIX = %d; the standard allows 8, 16, 32, 64, -32, -64 (table 8)", bp))
	}
	if c, err = need(2, "NAXIS"); err != nil {
		return err
	}
	na, err := c.int(2)
	if err != nil {
		return err
	}
	if na < 0 || na > 999 {
		return FormatError(fmt.Sprintf("NAXIS = %d must be in 0..999", na))
	}
	h.Naxis = make([]int64, na)
	for i := range h.Naxis {
		if c, err = need(3+i, "NAXIS"+strconv.Itoa(i+1)); err != nil {
			return err
		}
		v, err := c.int(3 + i)
		if err != nil {
			return err
		}
		if v < 0 {
			return FormatError(fmt.Sprintf("NAXIS%d = %d is negative", i+1, v))
		}
		h.Naxis[i] = v
	}
	for i, c := range cards {
		var err error
		switch c.Keyword {
		case "BSCALE":
			h.Bscale, err = c.float(i)
		case "BZERO":
			h.Bzero, err = c.float(i)
		case "BLANK":
			h.Blank, err = c.int(i)
			h.HasBlank = err == nil && h.Bitpix > 0 // ignored for floating-point data
		case "GROUPS":
			if c.Value == "T" {
				return UnsupportedError("random groups (GROUPS = T)")
			}
		}
		if err != nil {
			return err
		}
	}
	if h.Bscale == 0 {
		return FormatError("BSCALE = 0 would map every value to BZERO")
	}
	return nil
}
