package samples

import (
	"math"
	"math/rand/v2"
	"sync"
)

// Star-field scene constants. Counts are ADU at a gain of 1 e-/ADU, so the
// Poisson variance equals the signal in ADU.
const (
	starW, starH  = 512, 512
	starFrames    = 400
	starRef       = 150
	starChange    = 210
	starRise      = 12  // frames from first light to full brightness
	starHoldUntil = 250 // first frame of the fade
	starEnd       = 330 // first frame with the source gone

	starSky     = 800.0 // sky level, ADU
	starRead    = 8.0   // read noise, ADU
	starPerCt   = 1.0   // Poisson variance per ADU at gain 1
	starPSF     = 2.0   // Gaussian PSF sigma, px (FWHM about 4.7 px)
	starCount   = 1200
	starFluxMin = 500.0 // total ADU of the faintest star
	starAlpha   = 0.8   // N(>F) ~ F^-alpha
	// The brightest star peaks near 48000 ADU, so noise never reaches the
	// 16-bit ceiling: clipped pixels have a zero median absolute deviation
	// and make any robust reference model see huge shifts.
	starFluxMax = 1.2e6
	starClear   = 10.0 // no star centre this close to the transient, px

	starCX, starCY = 331.0, 197.0
	starPeak       = 2.5 // transient's centre pixel at full brightness, sky sigma
	starRadiusAt   = 0.5 // radius rule: added signal >= this many sigma
)

func newStarfield() Scenario {
	return Scenario{
		Name: "starfield",
		Description: "16-bit star-field patrol, 512 x 512, registered frames: 1200 stars with a " +
			"Gaussian PSF (sigma 2 px) and power-law brightness (N(>F) ~ F^-0.8, none " +
			"saturated), sky of about 800 ADU with a faint gradient, read plus Poisson noise; " +
			"a faint source at (331, 197) brightens from frame 210 over 12 frames to 2.5 sky " +
			"sigma at its centre pixel, holds until frame 250 and fades to nothing at frame 330. " +
			"Invented scenario.",
		Width: starW, Height: starH,
		Frames: starFrames, ReferenceFrames: starRef,
		Seed: 1,
		m:    theStarfield,
	}
}

var theStarfield = &starfield{}

type starfield struct {
	once  sync.Once
	bg    []float32
	sigma float64 // noise sigma at the transient's centre, no change
	peak  float64 // transient's centre-pixel amplitude at full brightness, ADU
}

func (s *starfield) init() {
	s.once.Do(func() {
		s.bg = make([]float32, starW*starH)
		for y := 0; y < starH; y++ {
			for x := 0; x < starW; x++ {
				// Moonlight: a faint gradient across the field.
				s.bg[y*starW+x] = float32(starSky + 120*float64(x)/starW + 60*float64(y)/starH)
			}
		}
		rng := rand.New(rand.NewPCG(0x5eed, 2))
		for n := 0; n < starCount; n++ {
			var sx, sy float64
			for {
				sx, sy = rng.Float64()*starW, rng.Float64()*starH
				if math.Hypot(sx-starCX, sy-starCY) >= starClear {
					break
				}
			}
			// Inverse-CDF draw from a Pareto law: F = Fmin * u^(-1/alpha).
			u := 1 - rng.Float64() // (0, 1]
			flux := min(starFluxMin*math.Pow(u, -1/starAlpha), starFluxMax)
			addStar(s.bg, sx, sy, flux)
		}
		c := s.bg[int(starCY)*starW+int(starCX)]
		s.sigma = math.Sqrt(starRead*starRead + starPerCt*float64(c))
		s.peak = starPeak * s.sigma
	})
}

// addStar adds a Gaussian PSF of the given total flux, sampled at pixel
// centres, out to where it falls below 0.05 ADU.
func addStar(dst []float32, sx, sy, flux float64) {
	peak := flux / (2 * math.Pi * starPSF * starPSF)
	if peak <= 0.05 {
		return
	}
	r := min(40, math.Ceil(starPSF*math.Sqrt(2*math.Log(peak/0.05))))
	x0, x1 := max(0, int(sx-r)), min(starW-1, int(sx+r))
	y0, y1 := max(0, int(sy-r)), min(starH-1, int(sy+r))
	inv := 1 / (2 * starPSF * starPSF)
	for y := y0; y <= y1; y++ {
		dy := float64(y) + 0.5 - sy
		for x := x0; x <= x1; x++ {
			dx := float64(x) + 0.5 - sx
			dst[y*starW+x] += float32(peak * math.Exp(-(dx*dx+dy*dy)*inv))
		}
	}
}

func (s *starfield) background() []float32 { s.init(); return s.bg }

func (s *starfield) level(int) (float32, float32) { return 1, 0 }

func (s *starfield) noise() (float64, float64) { return starRead * starRead, starPerCt }

// light is the transient's brightness at frame i as a fraction of full.
func light(i int) float64 {
	switch {
	case i < starChange || i >= starEnd:
		return 0
	case i < starChange+starRise:
		return float64(i-starChange+1) / starRise
	case i < starHoldUntil:
		return 1
	}
	return float64(starEnd-i) / (starEnd - starHoldUntil)
}

func (s *starfield) radius(i int) float64 {
	a := light(i) * s.peak / (starRadiusAt * s.sigma)
	if a <= 1 {
		return 0
	}
	return starPSF * math.Sqrt(2*math.Log(a))
}

func (s *starfield) change(i int) *patch {
	a := light(i)
	if a == 0 {
		return nil
	}
	s.init()
	const r = 4 * starPSF
	box := boxAround(starCX, starCY, r, starW, starH)
	p := &patch{x0: box[0], y0: box[1], w: box[2] - box[0] + 1, h: box[3] - box[1] + 1}
	p.add = make([]float32, p.w*p.h)
	inv := 1 / (2 * starPSF * starPSF)
	// The transient is centred on pixel (starCX, starCY), so the centre
	// pixel gets the full amplitude.
	for y := 0; y < p.h; y++ {
		dy := float64(p.y0+y) - starCY
		for x := 0; x < p.w; x++ {
			dx := float64(p.x0+x) - starCX
			p.add[y*p.w+x] = float32(a * s.peak * math.Exp(-(dx*dx+dy*dy)*inv))
		}
	}
	return p
}

func (s *starfield) truth(frames int) Truth {
	s.init()
	t := Truth{
		ChangeFrame:        starChange,
		EndFrame:           starEnd,
		Centre:             [2]float64{starCX, starCY},
		RadiusAt:           make([]float64, frames),
		RadiusRule:         "radius in pixels within which the source adds at least 0.5 noise sigma of the sky",
		NoiseSigmaAtCentre: s.sigma,
		PeakSigma:          starPeak,
	}
	rmax := 0.0
	for i := 0; i < max(frames, starEnd); i++ {
		r := s.radius(i)
		rmax = max(rmax, r)
		if i < frames {
			t.RadiusAt[i] = r
		}
	}
	t.BBoxMax = boxAround(starCX, starCY, rmax, starW, starH)
	return t
}
