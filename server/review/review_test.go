package review

import (
	"context"
	"testing"

	"sparsewatch/frames"
)

func synth(t *testing.T, sp frames.Synthetic) frames.Source {
	t.Helper()
	src, err := frames.NewSynthetic(sp)
	if err != nil {
		t.Fatal(err)
	}
	return src
}

// A disc shifting by 3 noise sigma is found after the change, at its place,
// by every policy; reading costs what the budget says.
func TestRunFindsChange(t *testing.T) {
	sp := frames.Synthetic{Width: 40, Height: 30, Frames: 160, Level: 1000, Gradient: 50, Noise: 10, Seed: 3,
		ChangeFrame: 100, CX: 25, CY: 12, Radius: 3, Delta: 30}
	p := DefaultParams()
	p.ReferenceFrames = 30
	p.Budget = "10%"
	p.ARL0 = 500
	p.Paths = 60
	reps, err := RunPolicies(context.Background(), synth(t, sp), p, []string{"adaptive", "random", "full"}, Hooks{})
	if err != nil {
		t.Fatal(err)
	}
	for _, rep := range reps {
		t.Logf("%s: h=%.3f alarms=%+v pixels=%d", rep.Policy, rep.ControlLimit, rep.Alarms, rep.PixelsRead)
		if rep.Frames != 160 || rep.FramesWatched != 130 || rep.FirstWatched != 30 {
			t.Errorf("%s: frames %d watched %d first %d", rep.Policy, rep.Frames, rep.FramesWatched, rep.FirstWatched)
		}
		var first *Alarm
		before := 0
		for i := range rep.Alarms {
			if rep.Alarms[i].Frame < sp.ChangeFrame {
				before++
			} else if first == nil {
				first = &rep.Alarms[i]
			}
		}
		if before > 1 || first == nil {
			t.Fatalf("%s: %d alarms before the change, first after: %v", rep.Policy, before, first)
		}
		if len(first.Regions) == 0 {
			t.Fatalf("%s: alarm without a region", rep.Policy)
		}
		b := first.Regions[0].BBox
		if !(b[0] <= 25 && 25 <= b[2] && b[1] <= 12 && 12 <= b[3]) {
			t.Errorf("%s: first region %v misses the centre (25,12)", rep.Policy, b)
		}
		want := int64(30*40*30) + int64(rep.FramesWatched)*int64(rep.Budget)
		if rep.Policy == "full" {
			want = int64(160 * 40 * 30)
		}
		if rep.PixelsRead != want {
			t.Errorf("%s: pixels read %d, want %d", rep.Policy, rep.PixelsRead, want)
		}
	}
}
