package monitor

import (
	"fmt"
	"math/rand/v2"
	"testing"
)

// BenchmarkStep measures one frame (Next + Step) in control. Compare with
// BenchmarkStatePass, one read-and-write pass over every stream's state:
// the memory-bandwidth floor of any method that touches all m streams.
func BenchmarkStep(b *testing.B) {
	for _, size := range []int{1024} {
		for _, p := range []Policy{Adaptive, Random, Thompson, Spatial, Stride} {
			for _, frac := range []float64{0.003, 0.03, 0.3} {
				b.Run(fmt.Sprintf("%s/%dx%d/%.1f%%", p, size, size, frac*100), func(b *testing.B) {
					cfg := Config{Width: size, Height: size, Budget: int(frac * float64(size*size)), TopR: 10, Policy: p, Seed: 1}
					e := mustEngine(b, cfg)
					rng := rand.New(rand.NewPCG(1, 1))
					z := make([]float32, cfg.Streams())
					for k := range z {
						z[k] = float32(rng.NormFloat64())
					}
					for range 3 * (cfg.Streams() / cfg.Budget) {
						e.Step(z[:len(e.Next())], nil)
					}
					b.ResetTimer()
					for i := 0; i < b.N; i++ {
						if _, err := e.Step(z[:len(e.Next())], nil); err != nil {
							b.Fatal(err)
						}
					}
				})
			}
		}
	}
}

func BenchmarkStatePass(b *testing.B) {
	e := mustEngine(b, Config{Width: 1024, Height: 1024, Budget: 100, TopR: 10})
	for i := 0; i < b.N; i++ {
		e.StatePass()
	}
}

// BenchmarkStepFull measures one in-control frame of the full policy, on
// its fast path and (general) on the path every other policy takes.
func BenchmarkStepFull(b *testing.B) {
	for _, size := range []int{512, 1024} {
		for _, general := range []bool{false, true} {
			name := fmt.Sprintf("%dx%d", size, size)
			if general {
				name += "/general"
			}
			b.Run(name, func(b *testing.B) {
				cfg := Config{Width: size, Height: size, Budget: size * size, TopR: 10, Policy: Full, Seed: 1}
				e := mustEngine(b, cfg)
				e.fast = !general
				rng := rand.New(rand.NewPCG(1, 1))
				z := make([]float32, cfg.Streams())
				for k := range z {
					z[k] = float32(rng.NormFloat64())
				}
				for range 3 {
					e.Step(z, nil)
				}
				b.ResetTimer()
				for i := 0; i < b.N; i++ {
					if _, err := e.Step(z, nil); err != nil {
						b.Fatal(err)
					}
				}
			})
		}
	}
}
