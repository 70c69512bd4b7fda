package wind

import (
	"bytes"
	"encoding/binary"
	"errors"
	"math"
	"math/rand/v2"
	"testing"
)

// trained returns a curve learned from noisy logistic samples.
func trained(t testing.TB, o CurveOptions, seed uint64) *Curve {
	t.Helper()
	c := NewCurve(o)
	train(t, c, rand.New(rand.NewPCG(seed, seed+1)), 20000, 0.05, 0.05)
	return c
}

// TestCurveRoundTrip: a restored curve evaluates identically, re-encodes to
// the same bytes, and keeps learning exactly as the original.
func TestCurveRoundTrip(t *testing.T) {
	tests := []struct {
		name string
		o    CurveOptions
	}{
		{"defaults", CurveOptions{}},
		{"custom", CurveOptions{BinWidth: 0.25, MaxSpeed: 25, MinCount: 12, Memory: 3000}},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			a := trained(t, tc.o, 11)
			data, err := a.MarshalBinary()
			if err != nil {
				t.Fatal(err)
			}
			var b Curve
			if err := b.UnmarshalBinary(data); err != nil {
				t.Fatalf("UnmarshalBinary: %v", err)
			}
			if b.Options() != a.Options() || b.Samples() != a.Samples() {
				t.Fatalf("restored options %+v, %d samples; want %+v, %d", b.Options(), b.Samples(), a.Options(), a.Samples())
			}
			again, _ := b.MarshalBinary()
			if !bytes.Equal(again, data) {
				t.Fatal("re-encoding the restored curve gives other bytes")
			}
			rng := rand.New(rand.NewPCG(12, 13))
			for range 1000 {
				v, p := weibull(rng), rng.Float64()
				a.Add(v, p)
				b.Add(v, p)
			}
			for v := -1.0; v < 35; v += 0.1 {
				if x, y := a.Eval(v), b.Eval(v); x != y {
					t.Fatalf("Eval(%.1f): original %v, restored %v", v, x, y)
				}
			}
		})
	}
}

// TestCurveRoundTripEmpty: the zero Curve encodes and restores.
func TestCurveRoundTripEmpty(t *testing.T) {
	var a Curve
	data, err := a.MarshalBinary()
	if err != nil {
		t.Fatal(err)
	}
	b := NewCurve(CurveOptions{BinWidth: 1})
	if err := b.UnmarshalBinary(data); err != nil {
		t.Fatal(err)
	}
	if b.Options().BinWidth != 0.5 || !math.IsNaN(b.Eval(5)) {
		t.Errorf("restored empty curve: options %+v, Eval(5) = %v", b.Options(), b.Eval(5))
	}
}

// TestCurveUnmarshalRejects: corrupt snapshots give ErrBadSnapshot and
// leave the curve as it was.
func TestCurveUnmarshalRejects(t *testing.T) {
	good, err := trained(t, CurveOptions{}, 21).MarshalBinary()
	if err != nil {
		t.Fatal(err)
	}
	le := binary.LittleEndian
	edit := func(f func(b []byte) []byte) []byte { return f(append([]byte(nil), good...)) }
	firstBin := headerLen
	tests := []struct {
		name string
		data []byte
	}{
		{"empty", nil},
		{"short header", good[:headerLen-1]},
		{"bad magic", edit(func(b []byte) []byte { b[0] = 'x'; return b })},
		{"future version", edit(func(b []byte) []byte { le.PutUint16(b[4:], 2); return b })},
		{"NaN bin width", edit(func(b []byte) []byte { le.PutUint64(b[6:], math.Float64bits(math.NaN())); return b })},
		{"negative max speed", edit(func(b []byte) []byte { le.PutUint64(b[14:], math.Float64bits(-30)); return b })},
		{"zero min count", edit(func(b []byte) []byte { le.PutUint32(b[22:], 0); return b })},
		{"huge memory", edit(func(b []byte) []byte { le.PutUint32(b[26:], math.MaxUint32); return b })},
		{"bin count disagrees", edit(func(b []byte) []byte { le.PutUint32(b[30:], 61); return b })},
		{"too many bins", edit(func(b []byte) []byte { le.PutUint64(b[6:], math.Float64bits(1e-9)); return b })},
		{"truncated bins", good[:len(good)-1]},
		{"trailing bytes", append(append([]byte(nil), good...), 0)},
		{"NaN median", edit(func(b []byte) []byte {
			le.PutUint64(b[firstBin:], 3)
			le.PutUint64(b[firstBin+8:], math.Float64bits(math.NaN()))
			return b
		})},
		{"negative deviation", edit(func(b []byte) []byte {
			le.PutUint64(b[firstBin:], 3)
			le.PutUint64(b[firstBin+16:], math.Float64bits(-1))
			return b
		})},
		{"empty bin with an estimate", edit(func(b []byte) []byte {
			le.PutUint64(b[firstBin:], 0)
			le.PutUint64(b[firstBin+8:], math.Float64bits(0.3))
			return b
		})},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			c := NewCurve(CurveOptions{MinCount: 1})
			c.Add(7.1, 0.4)
			err := c.UnmarshalBinary(tc.data)
			if !errors.Is(err, ErrBadSnapshot) {
				t.Fatalf("UnmarshalBinary = %v, want ErrBadSnapshot", err)
			}
			if c.Samples() != 1 || c.Eval(7.25) != 0.4 || c.Options().MinCount != 1 {
				t.Errorf("a failed restore changed the curve")
			}
			t.Log(err)
		})
	}
}

// FuzzCurveUnmarshalBinary: any input either fails with ErrBadSnapshot or
// restores a curve that re-encodes to the same bytes and evaluates to a
// monotone curve; nothing panics.
func FuzzCurveUnmarshalBinary(f *testing.F) {
	for _, c := range []*Curve{new(Curve), trained(f, CurveOptions{}, 31), trained(f, CurveOptions{BinWidth: 2, MaxSpeed: 9, Memory: 7}, 32)} {
		data, err := c.MarshalBinary()
		if err != nil {
			f.Fatal(err)
		}
		f.Add(data)
		f.Add(data[:len(data)/2])
	}
	f.Add([]byte("pwcv"))
	f.Fuzz(func(t *testing.T, data []byte) {
		var c Curve
		if err := c.UnmarshalBinary(data); err != nil {
			if !errors.Is(err, ErrBadSnapshot) {
				t.Fatalf("error %v does not wrap ErrBadSnapshot", err)
			}
			return
		}
		again, err := c.MarshalBinary()
		if err != nil || !bytes.Equal(again, data) {
			t.Fatalf("re-encoding differs (err %v)", err)
		}
		prev := math.Inf(-1)
		for v := -1.0; v < 40; v += 0.25 {
			got := c.Eval(v)
			if c.Samples() == 0 {
				if !math.IsNaN(got) {
					t.Fatalf("empty curve: Eval(%v) = %v", v, got)
				}
				continue
			}
			if math.IsNaN(got) || got < prev-1e-9 {
				t.Fatalf("Eval(%v) = %v after %v", v, got, prev)
			}
			prev = got
		}
		c.Add(5, 0.5)
	})
}
