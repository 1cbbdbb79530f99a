package monitor

import "math"

const (
	maxRegions       = 64      // regions reported per frame
	maxRegionStreams = 1 << 16 // streams examined for regions per frame
)

// regionWork holds the preallocated buffers of region finding.
type regionWork struct {
	in    []uint8 // 1: candidate, 2: visited
	cand  []int32
	queue []int32
}

func (w *regionWork) init(m int) {
	w.in = make([]uint8, m)
	n := min(m, maxRegionStreams)
	w.cand = make([]int32, 0, n)
	w.queue = make([]int32, 0, n)
}

// episodeStep updates the alarm episode after frame t's G is known
// (METHODS.md section 6): an episode starts at the first frame with G >= h
// and ends when G falls below EndLevel (hysteresis), or at once in restart
// mode.
func (e *Engine) episodeStep(upd *Update, t int32) {
	h := e.limit
	frame := upd.Frame
	if h <= 0 || e.state == Watching {
		// Running in-control level of G: EWMA over watched frames, weight
		// 1/baseSpan (plain mean over the first baseSpan frames).
		e.baseN++
		wt := 1 / float64(min(e.baseN, baseSpan))
		e.gBase += wt * (upd.G - e.gBase)
	}
	if h <= 0 {
		upd.State = Watching
		return
	}
	switch e.state {
	case Watching:
		if upd.G >= h {
			e.state = Alarming
			e.findRegions(t)
			e.episode = Alarm{Frame: frame, EndFrame: -1, Peak: upd.G}
			e.started = e.episode
			e.started.Regions = append([]Region(nil), e.regions...)
			e.peakRegions = append(e.peakRegions[:0], e.regions...)
			upd.Started = &e.started
			if e.cfg.Restart {
				e.endEpisode(upd, frame)
				e.resetStats()
				upd.State = Alarming
				upd.Regions = e.regions
				return
			}
		}
	case Alarming:
		if upd.G < e.EndLevel() {
			e.endEpisode(upd, frame)
			upd.State = Watching
			e.regions = e.regions[:0]
			return
		}
		e.findRegions(t)
		if upd.G > e.episode.Peak {
			e.episode.Peak = upd.G
			e.peakRegions = append(e.peakRegions[:0], e.regions...)
		}
	}
	upd.State = e.state
	if e.state == Alarming {
		upd.Regions = e.regions
	}
}

// baseSpan is the span, in frames, of the running in-control level of G.
const baseSpan = 500

// EndLevel returns the level G must fall below to end an episode:
// base + Hysteresis*(h - base), base being the running in-control level of
// G (never above h).
func (e *Engine) EndLevel() float64 {
	base := min(max(e.gBase, 0), e.limit)
	return base + e.cfg.Hysteresis*(e.limit-base)
}

func (e *Engine) endEpisode(upd *Update, frame int) {
	e.ended = e.episode
	e.ended.EndFrame = frame
	e.ended.Regions = append([]Region(nil), e.peakRegions...)
	upd.Ended = &e.ended
	e.state = Watching
}

// findRegions fills e.regions with the 8-connected groups of streams read
// within the last window frames, by hysteresis thresholding (Canny 1986,
// IEEE PAMI 8(6)): a group is made of streams whose local statistic exceeds
// h/(2r) and must hold at least one above h/r. At the alarm frame the top-r
// sum has just reached h, so a changed blob's streams sit around h/r; the
// lower level keeps the blob whole instead of a few scattered peaks.
func (e *Engine) findRegions(t int32) {
	e.regions = e.regions[:0]
	seed := e.limit / float64(e.r)
	level := seed / 2
	window := int32(2*e.sweepLen + 2)
	ct := e.c * float64(t)
	wk := &e.regWork
	n := e.rank.topK(min(e.m, maxRegionStreams), e.scrID, e.scrKey, level-ct)
	wk.cand = wk.cand[:0]
	for k := 0; k < n; k++ {
		i := e.scrID[k]
		if e.scrKey[k]+ct > level && t-e.last[i] <= window {
			wk.cand = append(wk.cand, i)
			wk.in[i] = 1
		}
	}
	w, h := e.cfg.Width, e.cfg.Height
	for _, s := range wk.cand {
		if wk.in[s] != 1 || len(e.regions) == maxRegions {
			continue
		}
		// Breadth-first flood fill over candidates, 8-connectivity.
		wk.queue = append(wk.queue[:0], s)
		wk.in[s] = 2
		reg := Region{X0: math.MaxInt, Y0: math.MaxInt, X1: -1, Y1: -1}
		var sw, sx, sy float64
		peakID := s
		for qi := 0; qi < len(wk.queue); qi++ {
			i := wk.queue[qi]
			x, y := int(i)%w, int(i)/w
			l := e.currentL(i, t)
			reg.Area++
			reg.X0, reg.Y0 = min(reg.X0, x), min(reg.Y0, y)
			reg.X1, reg.Y1 = max(reg.X1, x), max(reg.Y1, y)
			sw += l
			sx += l * float64(x)
			sy += l * float64(y)
			if l > reg.Peak {
				reg.Peak, peakID = l, i
			}
			for dy := -1; dy <= 1; dy++ {
				for dx := -1; dx <= 1; dx++ {
					xx, yy := x+dx, y+dy
					if xx < 0 || yy < 0 || xx >= w || yy >= h {
						continue
					}
					j := int32(yy*w + xx)
					if wk.in[j] == 1 {
						wk.in[j] = 2
						wk.queue = append(wk.queue, j)
					}
				}
			}
		}
		if reg.Peak <= seed {
			continue // no stream above h/r: noise, not a region
		}
		reg.CX, reg.CY = sx/sw, sy/sw
		reg.Onset = e.onset(peakID)
		e.regions = append(e.regions, reg)
	}
	for _, i := range wk.cand {
		wk.in[i] = 0
	}
	if e.win != nil {
		e.windowRegions()
	}
	sortRegions(e.regions)
}

// sortRegions orders regions by peak, largest first (insertion sort: at
// most maxRegions items, no allocation).
func sortRegions(r []Region) {
	for i := 1; i < len(r); i++ {
		for j := i; j > 0 && r[j].Peak > r[j-1].Peak; j-- {
			r[j], r[j-1] = r[j-1], r[j]
		}
	}
}
