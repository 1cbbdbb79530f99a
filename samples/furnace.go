package samples

import (
	"math"
	"math/rand/v2"
	"sync"
)

// Furnace scene constants. The radiometry is Wien's approximation of
// Planck's law, L ~ exp(-c2/(lambda*T)), with the second radiation constant
// c2 = 14388 µm K (CODATA value, from memory) at a 3.9 µm band, a band
// common for looking through furnace gases (common practice).
const (
	furnaceW, furnaceH = 320, 240
	furnaceFrames      = 400
	furnaceRef         = 150
	furnaceChange      = 200

	wienC2     = 14388.0 // µm K
	furnaceLam = 3.9     // µm
	furnaceT0  = 1100.0  // K, mean wall temperature

	furnaceDark  = 1500.0  // counts with no radiance
	furnaceScale = 22500.0 // counts above dark at T0, centre, no vignetting
	furnaceFocal = 452.0   // px; cos^4 falloff gives about 0.7 in the corners
	furnaceFPN   = 0.004   // per-pixel gain error (fixed pattern), relative sd

	furnaceRead  = 25.0 // read noise, counts
	furnacePerCt = 0.5  // shot-noise variance per count (gain 2 e-/count)

	// The wall drifts by 0.05 K (about 0.03 noise sigma a pixel). Drift does
	// not average down like noise: on 4 x 4 tile means it is about 0.12
	// sigma, which is why it is kept this small.
	furnaceDrift       = 0.05  // K, amplitude of the slow wall drift
	furnaceDriftPeriod = 700.0 // frames

	furnaceCX, furnaceCY = 214.0, 92.0
	furnaceR0, furnaceR1 = 3.0, 8.0 // hot-spot radius at onset and when grown
	furnaceGrow          = 120.0    // frames from R0 to R1
	furnacePeak          = 1.6      // added signal at the centre, noise sigma
)

func newFurnace() Scenario {
	return Scenario{
		Name: "furnace",
		Description: "16-bit mid-wave thermal view of a furnace wall, 320 x 240: " +
			"1050-1150 K with a smooth gradient, cos^4 vignetting, fixed-pattern gain " +
			"error, read plus shot noise (variance grows with signal), a slow drift of " +
			"0.05 K; from frame 200 a hot spot (about 1.6 noise sigma at its centre " +
			"pixel) appears at (214, 92) and grows from radius 3 to 8 px over 120 frames. " +
			"Invented scenario.",
		Width: furnaceW, Height: furnaceH,
		Frames: furnaceFrames, ReferenceFrames: furnaceRef,
		Seed: 1,
		m:    theFurnace,
	}
}

var theFurnace = &furnace{}

type furnace struct {
	once sync.Once
	bg   []float32 // counts above dark, drift-free
	temp []float64 // wall temperature, K
	gain []float64 // counts above dark per unit Wien radiance
	dT   float64   // hot-spot temperature rise, K
}

func (f *furnace) init() {
	f.once.Do(func() {
		n := furnaceW * furnaceH
		f.bg = make([]float32, n)
		f.temp = make([]float64, n)
		f.gain = make([]float64, n)
		rng := rand.New(rand.NewPCG(0x5eed, 1))
		a := furnaceScale / wien(furnaceT0)
		for y := 0; y < furnaceH; y++ {
			for x := 0; x < furnaceW; x++ {
				p := y*furnaceW + x
				u, v := float64(x)/furnaceW-0.5, float64(y)/furnaceH-0.5
				// Hotter at the right and top, with a gentle waviness
				// from the burner pattern.
				t := furnaceT0 + 80*u - 60*v + 6*math.Sin(3*math.Pi*u)*math.Cos(2*math.Pi*v)
				dx, dy := float64(x)-furnaceW/2+0.5, float64(y)-furnaceH/2+0.5
				c := furnaceFocal / math.Sqrt(furnaceFocal*furnaceFocal+dx*dx+dy*dy)
				g := a * c * c * c * c * (1 + furnaceFPN*rng.NormFloat64())
				f.temp[p], f.gain[p] = t, g
				f.bg[p] = float32(g * wien(t))
			}
		}
		// Choose the rise so the centre pixel gains furnacePeak sigma.
		p := int(furnaceCY)*furnaceW + int(furnaceCX)
		b := float64(f.bg[p]) + furnaceDark
		add := furnacePeak * math.Sqrt(furnaceRead*furnaceRead+furnacePerCt*b)
		t := f.temp[p]
		tNew := wienC2 / furnaceLam / -math.Log((float64(f.bg[p])+add)/f.gain[p])
		f.dT = tNew - t
	})
}

// wien is the relative spectral radiance at temperature t.
func wien(t float64) float64 { return math.Exp(-wienC2 / (furnaceLam * t)) }

func (f *furnace) background() []float32 { f.init(); return f.bg }

// level applies the wall drift as one relative change of radiance,
// d ln L / dT = c2/(lambda T^2) at the mean temperature.
func (f *furnace) level(i int) (float32, float32) {
	dT := furnaceDrift * math.Sin(2*math.Pi*float64(i)/furnaceDriftPeriod)
	return float32(math.Exp(wienC2 / (furnaceLam * furnaceT0 * furnaceT0) * dT)), furnaceDark
}

func (f *furnace) noise() (float64, float64) { return furnaceRead * furnaceRead, furnacePerCt }

func (f *furnace) radius(i int) float64 {
	if i < furnaceChange {
		return 0
	}
	return furnaceR0 + (furnaceR1-furnaceR0)*min(1, float64(i-furnaceChange)/furnaceGrow)
}

// profile is 1 inside r <= R-1, 0 outside R+1, with a cosine edge, so the
// radius R is where the rise is half.
func profile(r, rad float64) float64 {
	switch {
	case r <= rad-1:
		return 1
	case r >= rad+1:
		return 0
	}
	return 0.5 * (1 + math.Cos(math.Pi*(r-(rad-1))/2))
}

func (f *furnace) change(i int) *patch {
	rad := f.radius(i)
	if rad == 0 {
		return nil
	}
	f.init()
	box := boxAround(furnaceCX, furnaceCY, rad+1, furnaceW, furnaceH)
	p := &patch{x0: box[0], y0: box[1], w: box[2] - box[0] + 1, h: box[3] - box[1] + 1}
	p.add = make([]float32, p.w*p.h)
	scale, _ := f.level(i)
	for y := 0; y < p.h; y++ {
		for x := 0; x < p.w; x++ {
			px, py := p.x0+x, p.y0+y
			w := profile(math.Hypot(float64(px)-furnaceCX, float64(py)-furnaceCY), rad)
			if w == 0 {
				continue
			}
			q := py*furnaceW + px
			t := f.temp[q]
			p.add[y*p.w+x] = scale * float32(f.gain[q]*(wien(t+w*f.dT)-wien(t)))
		}
	}
	return p
}

func (f *furnace) truth(frames int) Truth {
	f.init()
	t := Truth{
		ChangeFrame: furnaceChange,
		EndFrame:    -1,
		Centre:      [2]float64{furnaceCX, furnaceCY},
		RadiusAt:    make([]float64, frames),
		RadiusRule:  "radius of the hot spot in pixels where its temperature rise is half (full inside radius-1, none beyond radius+1)",
		BBoxMax:     boxAround(furnaceCX, furnaceCY, furnaceR1+1, furnaceW, furnaceH),
	}
	for i := range t.RadiusAt {
		t.RadiusAt[i] = f.radius(i)
	}
	p := int(furnaceCY)*furnaceW + int(furnaceCX)
	b := float64(f.bg[p]) + furnaceDark
	t.NoiseSigmaAtCentre = math.Sqrt(furnaceRead*furnaceRead + furnacePerCt*b)
	q := f.gain[p] * (wien(f.temp[p]+f.dT) - wien(f.temp[p]))
	t.PeakSigma = q / t.NoiseSigmaAtCentre
	return t
}
