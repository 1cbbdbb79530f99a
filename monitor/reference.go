package monitor

import (
	"fmt"
	"math"
	"slices"

	"gonum.org/v1/gonum/stat/distuv"
)

// ModelKind chooses how raw values are turned into standardised values.
type ModelKind string

const (
	// Robust: z = (x - median) / (1.4826 * MAD), per stream.
	Robust ModelKind = "robust"
	// MeanSD: z = (x - mean) / sd (Welford); O(m) memory, for big grids.
	MeanSD ModelKind = "mean-sd"
	// NormalScore: z = Phi^-1((rank + 0.5)/(N + 1)) against the stream's own
	// reference values (van der Waerden 1952), distribution-free.
	NormalScore ModelKind = "normal-score"
	// SelfStart: each new value is standardised against the running mean and
	// sd of all earlier in-control values of its stream and mapped through
	// Student's t to a normal score, so that for normal noise z is exactly
	// N(0,1) and independent over time however few reference frames there
	// were (Hawkins 1987, The Statistician 36, "Self-starting CUSUM charts
	// for location and scale"). The other kinds freeze an estimate whose
	// error each CUSUM accumulates for ever; see Model.Learn.
	SelfStart ModelKind = "self-start"
)

// DefaultScaleFloor is the smallest scale a stream may have, in raw units:
// half a grey level. Integer pixels of a quiet camera can have zero spread
// over the reference frames; without a floor one step of quantisation would
// look like an infinite shift. Raise it to the sensor's quantisation step
// when values are scaled (e.g. 16-bit data from a 12-bit sensor: 8).
const DefaultScaleFloor = 0.5

// ModelOptions configures a Learner.
type ModelOptions struct {
	Kind       ModelKind // default Robust
	ScaleFloor float32   // default DefaultScaleFloor
}

// Learner collects N reference frames and builds a per-stream Model.
type Learner struct {
	m, n  int
	opt   ModelOptions
	count int
	vals  []float32 // m x n, stream-major, for Robust and NormalScore
	nObs  []int32   // valid values per stream
	mean  []float64 // Welford running mean (MeanSD)
	m2    []float64
}

// NewLearner prepares to learn m streams from n reference frames.
func NewLearner(m, n int, opt ModelOptions) (*Learner, error) {
	if opt.Kind == "" {
		opt.Kind = Robust
	}
	if opt.ScaleFloor == 0 {
		opt.ScaleFloor = DefaultScaleFloor
	}
	switch {
	case m <= 0:
		return nil, fmt.Errorf("monitor: reference model needs at least one stream, got %d", m)
	case n < 2:
		return nil, fmt.Errorf("monitor: reference frames %d must be at least 2", n)
	case !(opt.ScaleFloor > 0):
		return nil, fmt.Errorf("monitor: scale floor %v must be > 0", opt.ScaleFloor)
	}
	l := &Learner{m: m, n: n, opt: opt, nObs: make([]int32, m)}
	switch opt.Kind {
	case Robust, NormalScore:
		l.vals = make([]float32, m*n)
	case MeanSD, SelfStart:
		if opt.Kind == SelfStart && n < 3 {
			return nil, fmt.Errorf("monitor: reference frames %d must be at least 3 for the self-start model", n)
		}
		l.mean = make([]float64, m)
		l.m2 = make([]float64, m)
	default:
		return nil, fmt.Errorf("monitor: model %q unknown (choose robust, mean-sd, normal-score)", opt.Kind)
	}
	return l, nil
}

// Count returns the reference frames added so far.
func (l *Learner) Count() int { return l.count }

// Done reports whether all n reference frames are in.
func (l *Learner) Done() bool { return l.count >= l.n }

// Add adds one reference frame: the raw values of all m streams, NaN for a
// missing value.
func (l *Learner) Add(frame []float32) error {
	if len(frame) != l.m {
		return fmt.Errorf("monitor: reference frame has %d values, want %d", len(frame), l.m)
	}
	if l.Done() {
		return fmt.Errorf("monitor: already have %d reference frames", l.n)
	}
	for i, v := range frame {
		if math.IsNaN(float64(v)) || math.IsInf(float64(v), 0) {
			continue
		}
		k := l.nObs[i]
		l.nObs[i]++
		if l.vals != nil {
			l.vals[i*l.n+int(k)] = v
			continue
		}
		// Welford (1962, Technometrics 4) running mean and sum of squares.
		x := float64(v)
		dlt := x - l.mean[i]
		l.mean[i] += dlt / float64(k+1)
		l.m2[i] += dlt * (x - l.mean[i])
	}
	l.count++
	return nil
}

// Model is a learnt per-stream in-control description. A stream with fewer
// than 2 valid reference values is dead: it is reported missing forever.
type Model struct {
	Kind       ModelKind
	Loc, Scale []float32
	Dead       []bool
	Floored    int // streams whose scale was raised to the floor
	n          int
	sorted     []float32 // NormalScore: per stream sorted reference values
	nObs       []int32
	scores     [][]float32 // NormalScore: z for each half-rank, per sample size
	mean, m2   []float64   // SelfStart: Welford running mean and sum of squares
	floor      float32
}

// Model builds the model from the frames added so far (at least 2).
func (l *Learner) Model() (*Model, error) {
	if l.count < 2 {
		return nil, fmt.Errorf("monitor: reference model needs at least 2 frames, have %d", l.count)
	}
	md := &Model{Kind: l.opt.Kind, Loc: make([]float32, l.m), Scale: make([]float32, l.m),
		Dead: make([]bool, l.m), n: l.n, nObs: l.nObs, floor: l.opt.ScaleFloor}
	if l.opt.Kind == SelfStart {
		md.mean, md.m2 = l.mean, l.m2
	}
	floor := l.opt.ScaleFloor
	buf := make([]float32, l.n)
	for i := 0; i < l.m; i++ {
		k := int(l.nObs[i])
		if k < 2 {
			md.Dead[i] = true
			md.Scale[i] = floor
			continue
		}
		var loc, sc float32
		if l.vals != nil {
			v := l.vals[i*l.n : i*l.n+k]
			slices.Sort(v) // kept sorted for normal scores
			loc = median(v)
			for j, x := range v {
				buf[j] = float32(math.Abs(float64(x - loc)))
			}
			slices.Sort(buf[:k])
			sc = 1.4826 * median(buf[:k]) // MAD consistency factor for normal data
		} else {
			loc = float32(l.mean[i])
			sc = float32(math.Sqrt(l.m2[i] / float64(k-1)))
		}
		if sc < floor {
			sc = floor
			md.Floored++
		}
		md.Loc[i], md.Scale[i] = loc, sc
	}
	if l.opt.Kind == NormalScore {
		md.sorted = l.vals
		md.scores = make([][]float32, l.n+1)
		std := distuv.UnitNormal
		for k := 2; k <= l.n; k++ {
			s := make([]float32, 2*k+1)
			for hr := 0; hr <= 2*k; hr++ {
				u := (float64(hr)/2 + 0.5) / float64(k+1)
				s[hr] = float32(std.Quantile(u))
			}
			md.scores[k] = s
		}
	}
	return md, nil
}

func median(sorted []float32) float32 {
	n := len(sorted)
	if n%2 == 1 {
		return sorted[n/2]
	}
	return (sorted[n/2-1] + sorted[n/2]) / 2
}

// Standardize turns the raw values of streams idx into standardised values
// z, and sets missing[k] for a NaN raw value or a dead stream. z and missing
// must have len(idx) entries.
func (md *Model) Standardize(z []float32, missing []bool, idx []int32, raw []float32) {
	if len(z) != len(idx) || len(missing) != len(idx) || len(raw) != len(idx) {
		panic("monitor: Standardize length mismatch")
	}
	for k, i := range idx {
		x := raw[k]
		if md.Dead[i] || math.IsNaN(float64(x)) || math.IsInf(float64(x), 0) {
			z[k], missing[k] = 0, true
			continue
		}
		missing[k] = false
		switch md.Kind {
		case NormalScore:
			z[k] = md.normalScore(i, x)
		case SelfStart:
			z[k] = md.selfStartScore(i, x)
		default:
			z[k] = (x - md.Loc[i]) / md.Scale[i]
		}
	}
}

// selfStartScore is Hawkins' (1987) self-starting score of x against the
// n earlier values of stream i: T = (x - mean)/sd * sqrt(n/(n+1)) follows
// Student's t with n-1 degrees of freedom; z = Phi^-1(F_t(T)).
func (md *Model) selfStartScore(i int32, x float32) float32 {
	n := float64(md.nObs[i])
	t := (float64(x) - md.mean[i]) / float64(md.Scale[i]) * math.Sqrt(n/(n+1))
	return float32(tToNormal(t, n-1))
}

// tToNormal maps a Student's t value with nu degrees of freedom to the
// standard normal value of the same tail probability. For nu >= 30 it uses
// z = sign(t) sqrt((nu - 1/2) ln(1 + t^2/nu)), a closed-form approximation
// (Wallace-type, from memory; the test checks it against gonum's exact t
// CDF: error below 0.002 for |z| <= 6 at nu >= 48); below that, gonum's
// exact CDF, which costs a microsecond.
func tToNormal(t, nu float64) float64 {
	if nu >= 30 {
		return math.Copysign(math.Sqrt((nu-0.5)*math.Log1p(t*t/nu)), t)
	}
	st := distuv.StudentsT{Mu: 0, Sigma: 1, Nu: nu}
	if t > 0 {
		return -distuv.UnitNormal.Quantile(st.Survival(t))
	}
	return distuv.UnitNormal.Quantile(st.CDF(t))
}

// Learn folds the in-control values just read into a self-start model
// (Welford 1962 update of mean and variance); the other kinds ignore it.
// Call it after the values were standardised and stepped, and not while an
// alarm is on: a change learnt as "in control" would be absorbed into the
// reference.
func (md *Model) Learn(idx []int32, raw []float32, missing []bool) {
	if md.Kind != SelfStart {
		return
	}
	for k, i := range idx {
		if missing[k] || md.Dead[i] {
			continue
		}
		x := float64(raw[k])
		n := md.nObs[i] + 1
		md.nObs[i] = n
		d := x - md.mean[i]
		md.mean[i] += d / float64(n)
		md.m2[i] += d * (x - md.mean[i])
		sc := float32(math.Sqrt(md.m2[i] / float64(n-1)))
		md.Loc[i], md.Scale[i] = float32(md.mean[i]), max(sc, md.floor)
	}
}

// normalScore ranks x among stream i's reference values (mid-rank for ties).
func (md *Model) normalScore(i int32, x float32) float32 {
	k := int(md.nObs[i])
	v := md.sorted[int(i)*md.n : int(i)*md.n+k]
	lo, _ := slices.BinarySearch(v, x)                                         // values < x
	hi, _ := slices.BinarySearch(v, math.Nextafter32(x, float32(math.Inf(1)))) // values <= x
	return md.scores[k][lo+hi]                                                 // half-rank index 2*(lo + (hi-lo)/2)
}

// StandardizeFrame standardises a whole frame of m raw values in place of z
// (NaN for missing or dead streams), e.g. to build bootstrap frames.
func (md *Model) StandardizeFrame(z []float32, raw []float32) {
	for i, x := range raw {
		if md.Dead[i] || math.IsNaN(float64(x)) || math.IsInf(float64(x), 0) {
			z[i] = float32(math.NaN())
			continue
		}
		if md.Kind == NormalScore {
			z[i] = md.normalScore(int32(i), x)
			continue
		}
		z[i] = (x - md.Loc[i]) / md.Scale[i]
	}
}

// Clone returns a model that learns on its own: each engine reading its
// own streams needs its own self-start state. Read-only parts are shared.
func (md *Model) Clone() *Model {
	c := *md
	if md.Kind == SelfStart {
		c.Loc, c.Scale = slices.Clone(md.Loc), slices.Clone(md.Scale)
		c.nObs, c.mean, c.m2 = slices.Clone(md.nObs), slices.Clone(md.mean), slices.Clone(md.m2)
	}
	return &c
}
