package monitor

import (
	"math"
	"math/rand/v2"
	"reflect"
	"slices"
	"strings"
	"testing"
)

// mustEngine builds an engine or fails the test.
func mustEngine(tb testing.TB, cfg Config) *Engine {
	tb.Helper()
	e, err := New(cfg)
	if err != nil {
		tb.Fatal(err)
	}
	return e
}

// stepNormal feeds N(0,1) values (plus shift on changed streams).
func stepNormal(tb testing.TB, e *Engine, rng *rand.Rand, z []float32, changed map[int32]bool, delta float32) Update {
	tb.Helper()
	idx := e.Next()
	z = z[:len(idx)]
	for k, i := range idx {
		z[k] = float32(rng.NormFloat64())
		if changed[i] {
			z[k] += delta
		}
	}
	u, err := e.Step(z, nil)
	if err != nil {
		tb.Fatal(err)
	}
	return u
}

// TestLazyStateMatchesDirect checks the lazy compensation and the bucket
// order against a direct O(m) implementation of the same published rules
// (Page 1954 CUSUM, compensation per Liu, Mei & Shi 2015, top-r sum per
// Mei 2010), for every policy.
func TestLazyStateMatchesDirect(t *testing.T) {
	for _, p := range Policies {
		t.Run(string(p), func(t *testing.T) {
			cfg := Config{Width: 17, Height: 13, Budget: 20, TopR: 5, Policy: p, Seed: 3, CompFraction: 0.5}
			e := mustEngine(t, cfg)
			m := cfg.Streams()
			c := e.Compensation()
			u := make([]float64, m)
			d := make([]float64, m)
			rng := rand.New(rand.NewPCG(1, 2))
			z := make([]float32, m)
			for f := 0; f < 600; f++ {
				idx := slices.Clone(e.Next())
				read := make([]bool, m)
				for k, i := range idx {
					z[k] = float32(rng.NormFloat64())
					if f > 300 && i%17 < 3 {
						z[k] += 1.5
					}
					read[i] = true
				}
				upd, err := e.Step(z[:len(idx)], nil)
				if err != nil {
					t.Fatal(err)
				}
				for k, i := range idx {
					u[i] = math.Max(0, u[i]+float64(z[k])-0.5)
					d[i] = math.Max(0, d[i]-float64(z[k])-0.5)
				}
				ls := make([]float64, m)
				for i := 0; i < m; i++ {
					if !read[i] {
						u[i] += c
						d[i] += c
					}
					ls[i] = math.Max(u[i], d[i])
				}
				slices.Sort(ls)
				var g float64
				for _, v := range ls[m-5:] {
					g += v
				}
				if math.Abs(g-upd.GPixel) > 1e-3*math.Max(1, g) {
					t.Fatalf("frame %d: top-r sum = %v, direct %v", f, upd.GPixel, g)
				}
				if p != Spatial && upd.G != upd.GPixel {
					t.Fatalf("frame %d: G = %v differs from the top-r sum %v", f, upd.G, upd.GPixel)
				}
				if p == Adaptive {
					// The next picks must be the q largest L (up to ties).
					loc := e.Local(nil)
					var minPicked float64 = math.Inf(1)
					picked := make([]bool, m)
					for _, i := range e.Next() {
						picked[i] = true
						minPicked = math.Min(minPicked, float64(loc[i]))
					}
					for i := 0; i < m; i++ {
						if !picked[i] && float64(loc[i]) > minPicked+1e-4 {
							t.Fatalf("frame %d: stream %d (L=%v) not picked, but a picked one has L=%v", f, i, loc[i], minPicked)
						}
					}
				}
			}
		})
	}
}

// TestPolicyConformance runs every policy in control: the budget holds at
// every frame, picks are distinct and ascending, and no stream is starved.
// The starvation bound: a stream unread for T frames has L >= c*T; in
// control the statistics of read streams stay below about lmax = 12 (a
// common-practice bound: far above any two-sided CUSUM with d=1 reaches in
// a few thousand frames), so after T = lmax/c + 2*ceil(m/q) frames it must
// be among the q largest. Random is checked against the coupon-collector
// bound ceil(m/q) * (ln m + 10) instead.
func TestPolicyConformance(t *testing.T) {
	for _, p := range append(slices.Clone(Policies), Oracle) {
		t.Run(string(p), func(t *testing.T) {
			cfg := Config{Width: 32, Height: 32, Budget: 31, TopR: 10, Policy: p, Seed: 7}
			if p == Oracle {
				cfg.Oracle = []int32{5, 6, 7}
			}
			e := mustEngine(t, cfg)
			m, q := cfg.Streams(), cfg.Budget
			sweep := (m + q - 1) / q
			bound := 2 * sweep // full, stride; oracle (c = 0) is checked for budget only
			if c := e.Compensation(); c > 0 {
				bound = int(12/c) + 2*sweep
			}
			if p == Random {
				bound = int(float64(sweep) * (math.Log(float64(m)) + 10))
			}
			if p == Full || p == Stride {
				bound = sweep // a systematic sweep reads each stream every ceil(m/q) frames
			}
			lastRead := make([]int, m)
			for i := range lastRead {
				lastRead[i] = -1
			}
			rng := rand.New(rand.NewPCG(9, 9))
			z := make([]float32, m)
			frames := 3 * bound
			for f := 0; f < frames; f++ {
				idx := e.Next()
				if len(idx) > q && p != Full {
					t.Fatalf("frame %d: %d reads exceed budget %d", f, len(idx), q)
				}
				for k := 1; k < len(idx); k++ {
					if idx[k] <= idx[k-1] {
						t.Fatalf("frame %d: picks not strictly ascending at %d", f, k)
					}
				}
				for _, i := range idx {
					lastRead[i] = f
				}
				stepNormal(t, e, rng, z, nil, 0)
				if p == Oracle || f < bound {
					continue
				}
				for i, lr := range lastRead {
					if f-lr > bound {
						t.Fatalf("frame %d: stream %d unread since frame %d (bound %d frames)", f, i, lr, bound)
					}
				}
			}
		})
	}
}

// TestStepAllocatesNothing checks the per-frame path allocates nothing after
// construction, for every policy.
func TestStepAllocatesNothing(t *testing.T) {
	for _, p := range Policies {
		cfg := Config{Width: 64, Height: 64, Budget: 120, TopR: 10, Policy: p, Seed: 1, Limit: 1e9}
		e := mustEngine(t, cfg)
		rng := rand.New(rand.NewPCG(1, 1))
		z := make([]float32, cfg.Streams())
		for range 200 {
			stepNormal(t, e, rng, z, nil, 0)
		}
		allocs := testing.AllocsPerRun(200, func() {
			idx := e.Next()
			for k := range idx {
				z[k] = float32(rng.NormFloat64())
			}
			if _, err := e.Step(z[:len(idx)], nil); err != nil {
				t.Fatal(err)
			}
		})
		if allocs != 0 {
			t.Errorf("%s: %.2f allocations per frame, want 0", p, allocs)
		}
	}
}

// TestBadConfig checks each bad field gets an error naming it, no panic.
func TestBadConfig(t *testing.T) {
	ok := Config{Width: 10, Height: 10, Budget: 5, TopR: 3}
	cases := []struct {
		name string
		mod  func(*Config)
		want string
	}{
		{"ErrBudgetOverStreams", func(c *Config) { c.Budget = 101 }, "budget"},
		{"ErrBudgetZero", func(c *Config) { c.Budget = 0 }, "budget"},
		{"ErrTopROverStreams", func(c *Config) { c.TopR = 101 }, "top-r"},
		{"ErrTopRZero", func(c *Config) { c.TopR = -1 }, "top-r"},
		{"ErrShiftNegative", func(c *Config) { c.Shift = -1 }, "shift"},
		{"ErrShiftNaN", func(c *Config) { c.Shift = math.NaN() }, "shift"},
		{"ErrEmptyGrid", func(c *Config) { c.Width = 0 }, "grid"},
		{"ErrCompensationAboveCeiling", func(c *Config) { c.CompFraction = 1.2 }, "compensation"},
		{"ErrPolicy", func(c *Config) { c.Policy = "sometimes" }, "policy"},
		{"ErrOracleWithoutStreams", func(c *Config) { c.Policy = Oracle }, "oracle"},
		{"ErrLimit", func(c *Config) { c.Limit = math.Inf(1) }, "limit"},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			c := ok
			tc.mod(&c)
			_, err := New(c)
			if err == nil || !strings.Contains(err.Error(), tc.want) {
				t.Fatalf("New(%+v) = %v, want an error naming %q", c, err, tc.want)
			}
		})
	}
	t.Run("ErrNonFiniteValue", func(t *testing.T) {
		e := mustEngine(t, ok)
		z := make([]float32, len(e.Next()))
		z[2] = float32(math.NaN())
		if _, err := e.Step(z, nil); err == nil || !strings.Contains(err.Error(), "NaN") {
			t.Fatalf("Step with NaN = %v, want error", err)
		}
		z[2] = float32(math.Inf(1))
		if _, err := e.Step(z, nil); err == nil || !strings.Contains(err.Error(), "Inf") {
			t.Fatalf("Step with Inf = %v, want error", err)
		}
		missing := make([]bool, len(z))
		missing[2] = true
		if _, err := e.Step(z, missing); err != nil {
			t.Fatalf("Step with the Inf marked missing: %v", err)
		}
		if _, err := e.Step(z[:1], nil); err == nil {
			t.Fatal("Step with too few values: no error")
		}
	})
}

// TestAlarmRegion plants a disk of shifted streams and checks the alarm's
// region box contains the disk centre, and the episode ends after the
// change stops (hysteresis).
func TestAlarmRegion(t *testing.T) {
	for _, p := range []Policy{Adaptive, Full, Spatial} {
		t.Run(string(p), func(t *testing.T) {
			cfg := Config{Width: 40, Height: 30, Budget: 120, TopR: 10, Policy: p, Seed: 5, Limit: 90}
			e := mustEngine(t, cfg)
			cx, cy := 27, 9
			changed := map[int32]bool{}
			for y := 0; y < 30; y++ {
				for x := 0; x < 40; x++ {
					if (x-cx)*(x-cx)+(y-cy)*(y-cy) <= 9 {
						changed[int32(y*40+x)] = true
					}
				}
			}
			rng := rand.New(rand.NewPCG(4, 4))
			z := make([]float32, cfg.Streams())
			var started, ended *Alarm
			for f := 0; f < 1200 && ended == nil; f++ {
				ch := map[int32]bool(nil)
				if f >= 300 && f < 400 {
					ch = changed
				}
				u := stepNormal(t, e, rng, z, ch, 1.5)
				if u.Started != nil && f >= 300 && started == nil {
					a := *u.Started
					started = &a
				}
				if u.Ended != nil && started != nil {
					a := *u.Ended
					ended = &a
				}
			}
			if started == nil {
				t.Fatal("no alarm after the change")
			}
			if len(started.Regions) == 0 {
				t.Fatal("alarm without a region")
			}
			r := started.Regions[0]
			if d2 := (r.CX-float64(cx))*(r.CX-float64(cx)) + (r.CY-float64(cy))*(r.CY-float64(cy)); d2 > 9 {
				t.Fatalf("first region %+v: centroid outside the changed disk around (%d,%d)", r, cx, cy)
			}
			// A sampled stream's last zero is seen only when it is read, so the
			// onset estimate can be early by a few sweeps of m/q frames.
			sweep := (cfg.Streams() + cfg.Budget - 1) / cfg.Budget
			if r.Onset < 300-6*sweep || r.Onset > started.Frame {
				t.Errorf("onset %d, want within 6 sweeps before the change at 300 and <= alarm frame %d", r.Onset, started.Frame)
			}
			if ended == nil || ended.EndFrame < 400 {
				t.Fatalf("episode did not end after the change stopped: %+v", ended)
			}
			if len(ended.Regions) == 0 {
				t.Fatal("ended episode has no regions at its peak")
			}
			if r := ended.Regions[0]; cx < r.X0 || cx > r.X1 || cy < r.Y0 || cy > r.Y1 {
				t.Fatalf("region at the episode's peak %+v does not contain the centre (%d,%d)", r, cx, cy)
			}
		})
	}
}

func TestSelectTop(t *testing.T) {
	rng := rand.New(rand.NewPCG(2, 3))
	for trial := 0; trial < 200; trial++ {
		n := 1 + rng.IntN(300)
		k := rng.IntN(n + 1)
		keys := make([]float64, n)
		ids := make([]int32, n)
		for i := range keys {
			keys[i] = float64(rng.IntN(20)) // many ties
			ids[i] = int32(i)
		}
		want := slices.Clone(keys)
		slices.Sort(want)
		slices.Reverse(want)
		selectTop(keys, ids, k)
		got := slices.Clone(keys[:k])
		slices.Sort(got)
		slices.Reverse(got)
		if !slices.Equal(got, want[:k]) {
			t.Fatalf("n=%d k=%d: top %v, want %v", n, k, got, want[:k])
		}
	}
}

// TestEpisodeEndsAboveZeroLevel: with many streams the in-control top-r sum
// sits well above half the limit, so an end level of Hysteresis*h alone
// would never be reached. The episode must still end once the change stops,
// and a second change must give a second alarm.
func TestEpisodeEndsAboveZeroLevel(t *testing.T) {
	cfg := Config{Width: 32, Height: 24, Budget: 768, TopR: 4, Policy: Full, Limit: 32}
	e := mustEngine(t, cfg)
	rng := rand.New(rand.NewPCG(8, 8))
	z := make([]float32, cfg.Streams())
	changed := map[int32]bool{100: true, 101: true, 132: true, 133: true}
	var base float64
	starts, ends := 0, 0
	for f := 0; f < 3000; f++ {
		var ch map[int32]bool
		if (f >= 1000 && f < 1100) || (f >= 2000 && f < 2100) {
			ch = changed
		}
		u := stepNormal(t, e, rng, z, ch, 2)
		if f == 999 {
			base = e.gBase
		}
		if u.Started != nil && f >= 1000 {
			starts++
		}
		if u.Ended != nil && f >= 1000 {
			ends++
		}
	}
	if base < 0.5*cfg.Limit {
		t.Logf("in-control level of G %.1f is below h/2 = %.1f: this grid does not exercise the case", base, cfg.Limit/2)
	}
	if starts < 2 || ends < 2 {
		t.Fatalf("two separate changes gave %d alarm starts and %d ends (in-control G level %.1f, end level %.1f)", starts, ends, base, e.EndLevel())
	}
}

// TestFullFastPathMatchesGeneral runs the full policy on its fast path and
// on the general (rank-index) path with the same seeded input: a change that
// raises and ends an alarm, scattered and long-lasting missing values (NaN in
// the missing slots), a Reset, and restart mode. Every Update (G, regions,
// episodes, state), every stream's U, D, onset frames and local statistic,
// and the rebuilt rank lists must agree exactly. G is summed in another order
// on the fast path; it is still equal here because the sum of r float32
// values is exact in float64 unless they span a ratio above about 2^29/r.
func TestFullFastPathMatchesGeneral(t *testing.T) {
	for _, restart := range []bool{false, true} {
		for r, h := range map[int]float64{1: 12, 5: 60, 480: 1200} {
			cfg := Config{Width: 24, Height: 20, Budget: 1, TopR: r, Policy: Full, Seed: 4, Limit: h, Restart: restart}
			fast, slow := mustEngine(t, cfg), mustEngine(t, cfg)
			slow.fast = false
			m := cfg.Streams()
			rng := rand.New(rand.NewPCG(5, 6))
			z := make([]float32, m)
			missing := make([]bool, m)
			var started, ended, regions int
			for f := 0; f < 700; f++ {
				if f == 560 {
					fast.Reset()
					slow.Reset()
				}
				for i := range z {
					x, y := i%cfg.Width, i/cfg.Width
					z[i] = float32(rng.NormFloat64())
					if f >= 150 && f < 210 && x >= 5 && x < 10 && y >= 4 && y < 9 {
						z[i] += 1.5
					}
					// 5% missing at random, and streams 0..39 missing for a stretch.
					missing[i] = rng.IntN(20) == 0 || (i < 40 && f >= 100 && f < 180 && i%3 != f%3)
					if missing[i] && rng.IntN(2) == 0 {
						z[i] = float32(math.NaN())
					}
				}
				var miss []bool
				if f%7 != 0 {
					miss = missing
				} else {
					for i := range z {
						if missing[i] {
							z[i] = 0 // a frame with nothing missing
						}
					}
				}
				before := slices.Clone(fast.u)
				uf, errF := fast.Step(z, miss)
				us, errS := slow.Step(z, miss)
				if errF != nil || errS != nil {
					t.Fatalf("frame %d: errors %v, %v", f, errF, errS)
				}
				if !reflect.DeepEqual(uf, us) {
					t.Fatalf("restart %v r %d frame %d: updates differ\nfast    %+v\ngeneral %+v", restart, r, f, uf, us)
				}
				for i := range miss {
					if miss[i] && fast.u[i] != before[i] && (uf.Started == nil || !restart) {
						t.Fatalf("frame %d: missing stream %d changed U from %v to %v", f, i, before[i], fast.u[i])
					}
				}
				if uf.Started != nil {
					started++
				}
				if uf.Ended != nil {
					ended++
				}
				regions += len(uf.Regions)
				sameFullState(t, f, fast, slow)
				if f%37 == 0 {
					sameRankLists(t, f, fast, slow)
				}
			}
			if started == 0 || (!restart && ended == 0) || regions == 0 {
				t.Fatalf("restart %v r %d: %d alarms started, %d ended, %d regions: the change must alarm", restart, r, started, ended, regions)
			}
		}
	}
}

// sameFullState checks the per-stream state and the local statistics agree.
func sameFullState(t *testing.T, f int, a, b *Engine) {
	t.Helper()
	for name, pair := range map[string][2][]int32{"last": {a.last, b.last}, "zeroU": {a.zeroU, b.zeroU}, "zeroD": {a.zeroD, b.zeroD}} {
		if !slices.Equal(pair[0], pair[1]) {
			t.Fatalf("frame %d: %s differs", f, name)
		}
	}
	if !slices.Equal(a.u, b.u) || !slices.Equal(a.dn, b.dn) {
		t.Fatalf("frame %d: U or D differs", f)
	}
	if la, lb := a.Local(nil), b.Local(nil); !slices.Equal(la, lb) {
		t.Fatalf("frame %d: local statistics differ", f)
	}
}

// sameRankLists rebuilds the fast engine's rank index (through topK) and
// checks its keys, bucket lists and their order equal the general path's.
func sameRankLists(t *testing.T, f int, a, b *Engine) {
	t.Helper()
	ka := a.rank.topK(a.m, a.scrID, a.scrKey, math.Inf(-1))
	kb := b.rank.topK(b.m, b.scrID, b.scrKey, math.Inf(-1))
	if ka != kb || !slices.Equal(a.scrID[:ka], b.scrID[:kb]) || !slices.Equal(a.scrKey[:ka], b.scrKey[:kb]) {
		t.Fatalf("frame %d: topK differs after the rebuild", f)
	}
	x, y := a.rank, b.rank
	if !slices.Equal(x.key, y.key) || !slices.Equal(x.head, y.head) || !slices.Equal(x.count, y.count) ||
		!slices.Equal(x.next, y.next) || !slices.Equal(x.prev, y.prev) || !slices.Equal(x.slot, y.slot) ||
		x.ovHead != y.ovHead || x.ovCount != y.ovCount || x.bottom != y.bottom {
		t.Fatalf("frame %d: rank lists differ after the rebuild", f)
	}
}

// TestFullFastPathRejectsNaN checks an unmarked NaN or infinity is refused
// on the fast path before any state changes, as on the general path.
func TestFullFastPathRejectsNaN(t *testing.T) {
	cfg := Config{Width: 8, Height: 8, Budget: 1, TopR: 3, Policy: Full, Seed: 1}
	e := mustEngine(t, cfg)
	rng := rand.New(rand.NewPCG(1, 1))
	z := make([]float32, cfg.Streams())
	for range 20 {
		stepNormal(t, e, rng, z, nil, 0)
	}
	u, frames := slices.Clone(e.u), e.Frames()
	for _, bad := range []float32{float32(math.NaN()), float32(math.Inf(1)), float32(math.Inf(-1))} {
		z[17] = bad
		if _, err := e.Step(z, nil); err == nil || !strings.Contains(err.Error(), "mark it missing") {
			t.Fatalf("value %v: error %v, want a refusal", bad, err)
		}
		missing := make([]bool, len(z))
		missing[3] = true // another slot missing: 17 is still refused
		if _, err := e.Step(z, missing); err == nil {
			t.Fatalf("value %v in an unmarked slot was accepted", bad)
		}
	}
	if !slices.Equal(u, e.u) || e.Frames() != frames {
		t.Fatal("a refused step changed the state")
	}
}
