package conformal

import (
	"bytes"
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"slices"
	"testing"
)

// TestWindowMatchesSlice compares the ring with a plain slice of the last N
// samples, at capacities around the 64-bit word boundaries.
func TestWindowMatchesSlice(t *testing.T) {
	for _, size := range []int{1, 2, 63, 64, 65, 128, 200} {
		t.Run(fmt.Sprintf("N=%d", size), func(t *testing.T) {
			rng := rand.New(rand.NewPCG(uint64(size), 3))
			w := NewWindow(size)
			var all []bool // every sample, true = hit
			for i := range 3*size + 7 {
				hit := rng.Float64() < 0.8
				w.Add(hit)
				all = append(all, hit)
				last := all[max(0, len(all)-size):]
				hits := 0
				miss := make([]bool, len(last))
				for k, h := range last {
					if h {
						hits++
					}
					miss[k] = !h
				}
				if w.Count() != len(last) || w.Hits() != hits || w.Misses() != len(last)-hits {
					t.Fatalf("step %d: count %d hits %d, want %d %d", i, w.Count(), w.Hits(), len(last), hits)
				}
				if want := float64(hits) / float64(len(last)); w.Coverage() != want {
					t.Fatalf("step %d: coverage %v, want %v", i, w.Coverage(), want)
				}
				if got := w.AppendMissSequence(nil); !slices.Equal(got, miss) {
					t.Fatalf("step %d: miss sequence %v, want %v", i, got, miss)
				}
				if got, want := w.Transitions(), Transitions(miss); got != want {
					t.Fatalf("step %d: transitions %+v, want %+v", i, got, want)
				}
			}
		})
	}
}

func TestWindowEmptyAndReset(t *testing.T) {
	w := NewWindow(10)
	if !math.IsNaN(w.Coverage()) || w.Count() != 0 {
		t.Errorf("empty window: coverage %v, count %d; want NaN, 0", w.Coverage(), w.Count())
	}
	for range 15 {
		w.Add(true)
	}
	w.Reset()
	w.Add(false)
	if w.Count() != 1 || w.Hits() != 0 || w.Size() != 10 {
		t.Errorf("after reset and one miss: count %d, hits %d, size %d", w.Count(), w.Hits(), w.Size())
	}
	defer func() {
		if recover() == nil {
			t.Error("NewWindow(0) did not panic")
		}
	}()
	NewWindow(0)
}

func TestWindowStateRoundTrip(t *testing.T) {
	for _, fill := range []int{0, 5, 70, 300} {
		t.Run(fmt.Sprintf("fill=%d", fill), func(t *testing.T) {
			w := NewWindow(70)
			rng := rand.New(rand.NewPCG(1, uint64(fill)))
			for range fill {
				w.Add(rng.IntN(3) > 0)
			}
			b, _ := w.MarshalBinary()
			var r Window
			if err := r.UnmarshalBinary(b); err != nil {
				t.Fatal(err)
			}
			for i := range 200 {
				hit := rng.IntN(2) == 0
				w.Add(hit)
				r.Add(hit)
				if r.Count() != w.Count() || r.Hits() != w.Hits() || r.Transitions() != w.Transitions() {
					t.Fatalf("step %d after restore: (%d, %d) want (%d, %d)", i, r.Count(), r.Hits(), w.Count(), w.Hits())
				}
			}
		})
	}
}

func TestWindowStateRefusesBadData(t *testing.T) {
	w := NewWindow(10)
	w.Add(true)
	good, _ := w.MarshalBinary() // size 10, count 1, next 1
	set := func(off int, v byte) []byte { b := bytes.Clone(good); b[off] = v; return b }
	cases := []struct {
		name string
		data []byte
	}{
		{"empty", nil},
		{"unknown version", set(0, 3)},
		{"short header", good[:12]},
		{"zero capacity", set(1, 0)},
		{"capacity beyond the ring", set(1, 65)},
		{"missing word", good[:len(good)-8]},
		{"count above capacity", set(9, 11)},
		{"next slot not after the filled ones", set(17, 5)},
		{"hit bit in an empty slot", set(25, 0b11)},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			r := NewWindow(3)
			if err := r.UnmarshalBinary(c.data); !errors.Is(err, ErrState) {
				t.Fatalf("err = %v, want ErrState", err)
			}
			if r.Size() != 3 {
				t.Error("a failed restore changed the window")
			}
		})
	}
}

// FuzzWindowUnmarshal: the window decoder must not panic, and a state it
// accepts must encode back to the same bytes.
func FuzzWindowUnmarshal(f *testing.F) {
	w := NewWindow(70)
	for i := range 90 {
		w.Add(i%3 != 0)
	}
	good, _ := w.MarshalBinary()
	f.Add(good)
	f.Add([]byte{1})
	f.Fuzz(func(t *testing.T, data []byte) {
		var w Window
		if !roundTrip(t, &w, data) {
			return
		}
		w.Add(true) // a restored window must be usable
	})
}

// TestEWCoverage checks the weighting against its definition: after n
// samples the coverage is sum_k d^k hit_{n-k} / sum_k d^k with d = 2^(-1/h).
func TestEWCoverage(t *testing.T) {
	const h = 10.0
	e := NewEWCoverage(h)
	if !math.IsNaN(e.Coverage()) || e.Weight() != 0 {
		t.Errorf("empty: coverage %v, weight %v", e.Coverage(), e.Weight())
	}
	if !near(e.HalfLife(), h, 1e-12) {
		t.Errorf("half-life %v, want %v", e.HalfLife(), h)
	}
	rng := rand.New(rand.NewPCG(4, 4))
	var hist []bool
	for range 300 {
		hit := rng.Float64() < 0.7
		e.Add(hit)
		hist = append(hist, hit)
	}
	num, den := 0.0, 0.0
	for k := range hist {
		wgt := math.Pow(0.5, float64(k)/h)
		den += wgt
		if hist[len(hist)-1-k] {
			num += wgt
		}
	}
	if !near(e.Coverage(), num/den, 1e-12) || !near(e.Weight(), den, 1e-9) {
		t.Errorf("coverage %v weight %v, want %v %v", e.Coverage(), e.Weight(), num/den, den)
	}
	// A sample h steps old weighs half a new one: after one miss followed
	// by h hits from an empty start, the miss's weight is 1/2.
	f := NewEWCoverage(h)
	f.Add(false)
	for range int(h) {
		f.Add(true)
	}
	if missW := f.Weight() - f.Coverage()*f.Weight(); !near(missW, 0.5, 1e-12) {
		t.Errorf("weight of a sample %v steps old = %v, want 0.5", h, missW)
	}

	b, _ := e.MarshalBinary()
	var r EWCoverage
	if err := r.UnmarshalBinary(b); err != nil || r != *e {
		t.Errorf("round trip: %+v, %v; want %+v", r, err, *e)
	}
	bad := bytes.Clone(b)
	copy(bad[9:], appendFloat(nil, 1e9)) // more hits than weight
	for _, d := range [][]byte{nil, {2}, b[:9], bad} {
		if err := r.UnmarshalBinary(d); !errors.Is(err, ErrState) {
			t.Errorf("UnmarshalBinary(% x) = %v, want ErrState", d, err)
		}
	}
}

func TestNewEWCoveragePanics(t *testing.T) {
	for _, h := range []float64{0, -1, math.NaN(), math.Inf(1)} {
		t.Run(fmt.Sprint(h), func(t *testing.T) {
			defer func() {
				if recover() == nil {
					t.Errorf("NewEWCoverage(%v) did not panic", h)
				}
			}()
			NewEWCoverage(h)
		})
	}
}
