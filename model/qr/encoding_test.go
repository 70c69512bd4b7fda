package qr

import (
	"bytes"
	"encoding/binary"
	"errors"
	"hash/crc32"
	"math"
	"math/rand/v2"
	"testing"
)

// trained returns a learner of p features after n updates on invented data.
func trained(p int, o OnlineOptions, n int) *Online {
	m := NewOnline(p, 0.7, o)
	rng := rand.New(rand.NewPCG(uint64(p), uint64(n)))
	x := make([]float64, p)
	for i := 0; i < n; i++ {
		x[0] = 1
		for j := 1; j < p; j++ {
			x[j] = rng.Float64() * float64(10*j)
		}
		m.Update(x, x[p-1]*0.5+rng.NormFloat64())
	}
	return m
}

// resign recomputes the checksum of a blob edited in place.
func resign(b []byte) []byte {
	binary.LittleEndian.PutUint32(b[len(b)-4:], crc32.ChecksumIEEE(b[:len(b)-4]))
	return b
}

func TestOnlineMarshalRoundTrip(t *testing.T) {
	cases := []struct {
		name string
		p    int
		o    OnlineOptions
		n    int
	}{
		{"fresh", 1, OnlineOptions{}, 0},
		{"defaults", 3, OnlineOptions{}, 700},
		{"never forget, no average", 2, OnlineOptions{Memory: -1, Average: -1}, 700},
		{"explicit", 5, OnlineOptions{Rate: 0.3, Memory: 50, Average: 7}, 300},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			a := trained(c.p, c.o, c.n)
			blob, err := a.MarshalBinary()
			if err != nil {
				t.Fatal(err)
			}
			var b Online
			if err := b.UnmarshalBinary(blob); err != nil {
				t.Fatal(err)
			}
			if b.Tau() != a.Tau() || b.Updates() != a.Updates() {
				t.Errorf("tau %v updates %d, want %v %d", b.Tau(), b.Updates(), a.Tau(), a.Updates())
			}
			// Both continue in lockstep and must agree exactly.
			rng := rand.New(rand.NewPCG(9, 9))
			x := make([]float64, c.p)
			for i := 0; i < 500; i++ {
				for j := range x {
					x[j] = rng.NormFloat64()
				}
				if qa, qb := a.Predict(x), b.Predict(x); qa != qb {
					t.Fatalf("step %d: predictions %v and %v differ", i, qa, qb)
				}
				y := rng.NormFloat64()
				a.Update(x, y)
				b.Update(x, y)
			}
			ba, _ := a.MarshalBinary()
			bb, _ := b.MarshalBinary()
			if !bytes.Equal(ba, bb) {
				t.Error("states differ after continuing in lockstep")
			}
		})
	}
}

func TestOnlineMarshalUnconstructed(t *testing.T) {
	var m Online
	if _, err := m.MarshalBinary(); err == nil {
		t.Error("marshalling the zero Online succeeded")
	}
}

func TestOnlineUnmarshalRefuses(t *testing.T) {
	good, err := trained(3, OnlineOptions{}, 200).MarshalBinary()
	if err != nil {
		t.Fatal(err)
	}
	edit := func(f func(b []byte) []byte) []byte {
		return f(append([]byte(nil), good...))
	}
	putF := func(off int, v float64) func([]byte) []byte {
		return func(b []byte) []byte {
			binary.LittleEndian.PutUint64(b[off:], math.Float64bits(v))
			return resign(b)
		}
	}
	cases := []struct {
		name string
		blob []byte
		want error
	}{
		{"empty", nil, ErrEncoding},
		{"magic only", []byte("PQRO"), ErrEncoding},
		{"foreign magic", edit(func(b []byte) []byte { copy(b, "GZIP"); return b }), ErrEncoding},
		{"next version", edit(func(b []byte) []byte { binary.LittleEndian.PutUint16(b[4:], 2); return resign(b) }), ErrVersion},
		{"version zero", edit(func(b []byte) []byte { binary.LittleEndian.PutUint16(b[4:], 0); return resign(b) }), ErrVersion},
		{"truncated by one byte", good[:len(good)-1], ErrEncoding},
		{"trailing byte", append(append([]byte(nil), good...), 0), ErrEncoding},
		{"p zero", edit(func(b []byte) []byte { binary.LittleEndian.PutUint32(b[6:], 0); return resign(b) }), ErrEncoding},
		{"p huge", edit(func(b []byte) []byte { binary.LittleEndian.PutUint32(b[6:], math.MaxUint32); return resign(b) }), ErrEncoding},
		{"bit flip in a weight", edit(func(b []byte) []byte { b[90] ^= 0x10; return b }), ErrEncoding},
		{"bad checksum", edit(func(b []byte) []byte { b[len(b)-1] ^= 1; return b }), ErrEncoding},
		{"level outside (0, 1), signed", edit(putF(10, 1.5)), ErrEncoding},
		{"NaN rate, signed", edit(putF(18, math.NaN())), ErrEncoding},
		{"memory zero, signed", edit(func(b []byte) []byte { binary.LittleEndian.PutUint64(b[26:], 0); return resign(b) }), ErrEncoding},
		{"negative update count, signed", edit(func(b []byte) []byte { binary.LittleEndian.PutUint64(b[42:], math.MaxUint64); return resign(b) }), ErrEncoding},
		{"NaN weight, signed", edit(putF(onlineHeader, math.NaN())), ErrEncoding},
		{"negative feature scale, signed", edit(putF(onlineHeader+8*2*3, -1)), ErrEncoding},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			m := trained(2, OnlineOptions{}, 50)
			before, _ := m.MarshalBinary()
			err := m.UnmarshalBinary(c.blob)
			t.Log(err)
			if !errors.Is(err, c.want) {
				t.Errorf("err = %v, want %v", err, c.want)
			}
			after, _ := m.MarshalBinary()
			if !bytes.Equal(before, after) {
				t.Error("a refused blob changed the learner")
			}
		})
	}
	t.Run("every truncation", func(t *testing.T) {
		for n := 0; n < len(good); n++ {
			var m Online
			if err := m.UnmarshalBinary(good[:n]); !errors.Is(err, ErrEncoding) {
				t.Fatalf("%d of %d bytes: err = %v, want ErrEncoding", n, len(good), err)
			}
		}
	})
	t.Run("every single-byte corruption", func(t *testing.T) {
		for i := range good {
			b := append([]byte(nil), good...)
			b[i] ^= 0xA5
			var m Online
			if err := m.UnmarshalBinary(b); !errors.Is(err, ErrEncoding) && !errors.Is(err, ErrVersion) {
				t.Fatalf("byte %d corrupted: err = %v, want a refusal", i, err)
			}
		}
	})
}

// FuzzOnlineUnmarshalBinary: decoding arbitrary bytes never panics; what it
// accepts re-encodes to the same bytes and can predict and learn.
func FuzzOnlineUnmarshalBinary(f *testing.F) {
	for _, m := range []*Online{
		trained(1, OnlineOptions{}, 0),
		trained(2, OnlineOptions{}, 30),
		trained(4, OnlineOptions{Memory: -1, Average: -1, Rate: 2}, 30),
	} {
		b, err := m.MarshalBinary()
		if err != nil {
			f.Fatal(err)
		}
		f.Add(b)
		f.Add(b[:len(b)/2])
	}
	f.Add([]byte{})
	f.Add([]byte("PQRO\x02\x00"))
	f.Fuzz(func(t *testing.T, data []byte) {
		var m Online
		if err := m.UnmarshalBinary(data); err != nil {
			if !errors.Is(err, ErrEncoding) && !errors.Is(err, ErrVersion) {
				t.Fatalf("error %v wraps neither sentinel", err)
			}
			return
		}
		again, err := m.MarshalBinary()
		if err != nil {
			t.Fatal(err)
		}
		if !bytes.Equal(again, data) {
			t.Fatal("accepted blob does not re-encode to itself")
		}
		x := make([]float64, len(m.Coef(nil)))
		for i := range x {
			x[i] = float64(i) - 0.5
		}
		_ = m.Predict(x)
		m.Update(x, 1)
	})
}
