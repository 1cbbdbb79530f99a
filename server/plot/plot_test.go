package plot

import (
	"encoding/xml"
	"io"
	"math"
	"strings"
	"testing"
)

// wellFormed parses the output with encoding/xml (SVG is XML; W3C SVG 1.1).
func wellFormed(t *testing.T, s string) []xml.StartElement {
	t.Helper()
	d := xml.NewDecoder(strings.NewReader(s))
	var els []xml.StartElement
	for {
		tok, err := d.Token()
		if err == io.EOF {
			return els
		}
		if err != nil {
			t.Fatalf("SVG is not well-formed XML: %v\n%s", err, s)
		}
		if e, ok := tok.(xml.StartElement); ok {
			els = append(els, e)
		}
	}
}

func TestWriteSVG(t *testing.T) {
	c := Chart{Title: "delay <vs> budget", XLabel: "budget (%)", YLabel: "frames", LogX: true, LogY: true,
		Series: []Series{
			{Name: "adaptive", X: []float64{1, 3, 10}, Y: []float64{40, 19, 12}, Err: []float64{2, 1, 0.5}},
			{Name: "random", X: []float64{1, 3, 10}, Y: []float64{900, 250, 80}, Err: []float64{30, 10, math.NaN()}},
			{Name: "full", X: []float64{1, 3, 10}, Y: []float64{9.4, 9.4, math.Inf(1)}},
		}}
	var b strings.Builder
	if err := c.WriteSVG(&b); err != nil {
		t.Fatal(err)
	}
	s := b.String()
	els := wellFormed(t, s)
	if els[0].Name.Local != "svg" {
		t.Fatalf("root element %q, want svg", els[0].Name.Local)
	}
	count := map[string]int{}
	for _, e := range els {
		count[e.Name.Local]++
	}
	// 3 + 3 + 2 finite points; one polyline per series; 5 error bars.
	if count["circle"] != 8 || count["polyline"] != 3 || count["path"] != 5 {
		t.Errorf("element counts %v, want 8 circles, 3 polylines, 5 error-bar paths", count)
	}
	for _, want := range []string{"adaptive", "random", "full", "delay &lt;vs&gt; budget"} {
		if !strings.Contains(s, want) {
			t.Errorf("SVG lacks %q", want)
		}
	}
	if strings.Contains(s, "http://") && strings.Count(s, "http://") != 1 {
		t.Errorf("SVG refers to external resources")
	}
}

func TestWriteSVGErrors(t *testing.T) {
	var b strings.Builder
	if err := (Chart{Series: []Series{{Name: "x", X: []float64{1}, Y: []float64{1, 2}}}}).WriteSVG(&b); err == nil {
		t.Error("mismatched lengths: no error")
	}
	if err := (Chart{Series: []Series{{Name: "x", X: []float64{math.NaN()}, Y: []float64{1}}}}).WriteSVG(&b); err == nil {
		t.Error("no finite x: no error")
	}
	if err := (Chart{LogY: true, Series: []Series{{Name: "x", X: []float64{1}, Y: []float64{-1}}}}).WriteSVG(&b); err == nil {
		t.Error("log axis with no positive value: no error")
	}
}

func TestTicks(t *testing.T) {
	got := axis{lo: 1, hi: 100, log: true}.ticks()
	want := []float64{1, 2, 5, 10, 20, 50, 100}
	if len(got) != len(want) {
		t.Fatalf("log ticks %v, want %v", got, want)
	}
	for i := range want {
		if math.Abs(got[i]-want[i]) > 1e-9*want[i] {
			t.Fatalf("log ticks %v, want %v", got, want)
		}
	}
	lin := axis{lo: 0, hi: 10}.ticks()
	if len(lin) < 3 || len(lin) > 8 || lin[0] != 0 {
		t.Errorf("linear ticks %v", lin)
	}
}
