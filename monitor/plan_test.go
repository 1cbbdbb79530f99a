package monitor

import (
	"context"
	"errors"
	"testing"
)

func TestBudgetStreams(t *testing.T) {
	for _, tc := range []struct {
		b    float64
		m, q int
		ok   bool
	}{
		{0.03, 16384, 492, true}, // 491.52 rounds to 492
		{0.0001, 100, 1, true},   // never below one stream
		{500, 16384, 500, true},
		{0.999999, 100, 100, true},
		{0, 100, 0, false},
		{1.5, 100, 0, false},
		{101, 100, 0, false},
	} {
		q, err := BudgetStreams(tc.b, tc.m)
		if (err == nil) != tc.ok || q != tc.q {
			t.Errorf("BudgetStreams(%v, %d) = %d, %v; want %d (ok %v)", tc.b, tc.m, q, err, tc.q, tc.ok)
		}
	}
}

func TestPlanSmall(t *testing.T) {
	var last, total int
	spec := PlanSpec{Width: 12, Height: 12, Radius: 1.5, Shift: 1.5, Budgets: []float64{0.06, 0.25},
		Policies: []Policy{Adaptive, Full, Oracle}, ARL0: 100, TopR: 3, Runs: 30, Paths: 40, Burnin: 40, Seed: 4,
		Progress: func(d, tot int) { last, total = d, tot }}
	res, err := Plan(context.Background(), spec)
	if err != nil {
		t.Fatal(err)
	}
	if len(res) != 6 {
		t.Fatalf("%d results, want 2 budgets x 3 policies", len(res))
	}
	// Full and oracle do not depend on the budget: computed once.
	if res[1].Limit != res[4].Limit || res[2].ADD != res[5].ADD {
		t.Errorf("full/oracle recomputed per budget: %+v / %+v", res[1], res[4])
	}
	if res[0].Streams != 9 || res[3].Streams != 36 || res[0].Budget != 9.0/144 {
		t.Errorf("budgets: %+v, %+v", res[0], res[3])
	}
	if last != total || total != 4*(2*40+30) {
		t.Errorf("progress ended at %d/%d, want %d", last, total, 4*(2*40+30))
	}
	for _, r := range res {
		if !(r.ADD >= 1) || !(r.ARL0 > 0) || r.Note == "" {
			t.Errorf("result %+v", r)
		}
	}
	// The information bound: the oracle is fastest; more budget helps adaptive.
	if !(res[2].ADD < res[1].ADD && res[1].ADD <= res[0].ADD && res[3].ADD < res[0].ADD) {
		t.Errorf("delays adaptive %.2f/%.2f, full %.2f, oracle %.2f: want oracle < full <= adaptive and adaptive faster with more budget",
			res[0].ADD, res[3].ADD, res[1].ADD, res[2].ADD)
	}
}

func TestPlanErrors(t *testing.T) {
	base := PlanSpec{Width: 8, Height: 8, Radius: 1, Shift: 1, Budgets: []float64{0.1}, Policies: []Policy{Adaptive}, ARL0: 50, TopR: 2, Runs: 2, Paths: 4}
	for name, mod := range map[string]func(*PlanSpec){
		"ErrGrid":     func(s *PlanSpec) { s.Width = 0 },
		"ErrBudget":   func(s *PlanSpec) { s.Budgets = []float64{2.5} },
		"ErrPolicy":   func(s *PlanSpec) { s.Policies = []Policy{"greedy"} },
		"ErrNoBudget": func(s *PlanSpec) { s.Budgets = nil },
		"ErrShift":    func(s *PlanSpec) { s.Shift = -1 },
		"ErrComp":     func(s *PlanSpec) { s.Compensation = 1 }, // above c_max
	} {
		t.Run(name, func(t *testing.T) {
			s := base
			mod(&s)
			if _, err := Plan(context.Background(), s); err == nil {
				t.Error("no error")
			}
		})
	}
	ctx, cancel := context.WithCancel(context.Background())
	cancel()
	if _, err := Plan(ctx, base); !errors.Is(err, context.Canceled) {
		t.Errorf("cancelled plan: %v", err)
	}
}
