package conformal

import (
	"encoding/binary"
	"fmt"
	"math"
	"math/bits"
)

// Window is the rolling coverage over the last N hits and misses of one
// quantile: a ring of N bits, so memory is bounded by N/8 bytes and Add is
// O(1) without allocation. The zero Window is not usable: build one with
// NewWindow. A Window is not safe for concurrent use.
type Window struct {
	words []uint64 // bit i of the ring is sample slot i; 1 = hit
	size  int      // N, the capacity
	next  int      // slot of the next sample; the oldest sample once full
	count int      // samples held, <= size
	hits  int      // hits held
}

// NewWindow returns an empty window of the last n samples; it panics if n < 1.
func NewWindow(n int) *Window {
	if n < 1 {
		panic("conformal: NewWindow needs n >= 1")
	}
	return &Window{words: make([]uint64, (n+63)/64), size: n}
}

// Add records one outcome, dropping the oldest once the window is full.
func (w *Window) Add(hit bool) {
	i, mask := w.next>>6, uint64(1)<<(w.next&63)
	if w.count == w.size {
		if w.words[i]&mask != 0 {
			w.hits--
		}
	} else {
		w.count++
	}
	if hit {
		w.words[i] |= mask
		w.hits++
	} else {
		w.words[i] &^= mask
	}
	if w.next++; w.next == w.size {
		w.next = 0
	}
}

// Reset empties the window.
func (w *Window) Reset() {
	clear(w.words)
	w.next, w.count, w.hits = 0, 0, 0
}

// Size returns the capacity N.
func (w *Window) Size() int { return w.size }

// Count returns the number of samples held, at most Size.
func (w *Window) Count() int { return w.count }

// Hits returns the number of hits held.
func (w *Window) Hits() int { return w.hits }

// Misses returns the number of misses held.
func (w *Window) Misses() int { return w.count - w.hits }

// Coverage returns Hits/Count, or NaN when the window is empty.
func (w *Window) Coverage() float64 {
	if w.count == 0 {
		return math.NaN()
	}
	return float64(w.hits) / float64(w.count)
}

// at reports whether the k-th held sample (0 = oldest) is a hit.
func (w *Window) at(k int) bool {
	slot := w.next - w.count + k
	if slot < 0 {
		slot += w.size
	}
	return w.words[slot>>6]&(uint64(1)<<(slot&63)) != 0
}

// AppendMissSequence appends the held samples to dst, oldest first, true for
// a miss (the input of Christoffersen), and returns the extended slice.
func (w *Window) AppendMissSequence(dst []bool) []bool {
	for k := range w.count {
		dst = append(dst, !w.at(k))
	}
	return dst
}

// Transitions counts the hit/miss transitions of the held samples, as
// Transitions(w.AppendMissSequence(nil)) would, without allocating.
func (w *Window) Transitions() TransitionCounts {
	var c TransitionCounts
	for k := 1; k < w.count; k++ {
		c.add(!w.at(k-1), !w.at(k))
	}
	return c
}

// windowHeaderLen is the length of a version-1 window state before its
// words: the version byte and size, count and next as uint64.
const windowHeaderLen = 1 + 3*8

// MarshalBinary encodes the window: a version byte (1), the capacity, the
// count and the next slot as little-endian uint64, then the ring's
// ceil(N/64) words.
func (w *Window) MarshalBinary() ([]byte, error) {
	b := make([]byte, 0, windowHeaderLen+8*len(w.words))
	b = append(b, stateVersion)
	b = binary.LittleEndian.AppendUint64(b, uint64(w.size))
	b = binary.LittleEndian.AppendUint64(b, uint64(w.count))
	b = binary.LittleEndian.AppendUint64(b, uint64(w.next))
	for _, v := range w.words {
		b = binary.LittleEndian.AppendUint64(b, v)
	}
	return b, nil
}

// UnmarshalBinary replaces the window, capacity included, with one written
// by MarshalBinary. It refuses an unknown version, a wrong length or an
// inconsistent ring with an error wrapping ErrState, and leaves w unchanged
// then.
func (w *Window) UnmarshalBinary(data []byte) error {
	if _, err := newStateReader("window", data, 0); err != nil {
		return err
	}
	if len(data) < windowHeaderLen {
		return fmt.Errorf("%w: window: %d bytes, want at least %d", ErrState, len(data), windowHeaderLen)
	}
	size := binary.LittleEndian.Uint64(data[1:])
	count := binary.LittleEndian.Uint64(data[9:])
	next := binary.LittleEndian.Uint64(data[17:])
	body := data[windowHeaderLen:]
	if size < 1 || size > uint64(len(body))*8 {
		return fmt.Errorf("%w: window: capacity %d does not match %d bytes of ring", ErrState, size, len(body))
	}
	nw := int((size + 63) / 64)
	if len(body) != 8*nw {
		return fmt.Errorf("%w: window: %d bytes of ring, want %d for capacity %d", ErrState, len(body), 8*nw, size)
	}
	if count > size || next >= size || (count < size && next != count) {
		return fmt.Errorf("%w: window: count %d and next slot %d do not fit capacity %d", ErrState, count, next, size)
	}
	words := make([]uint64, nw)
	hits := 0
	for i := range words {
		words[i] = binary.LittleEndian.Uint64(body[8*i:])
		// Bits beyond the filled slots must be clear.
		lo := uint64(i) * 64
		if filled := min(count, size); filled < lo+64 {
			var keep uint64
			if filled > lo {
				keep = uint64(1)<<(filled-lo) - 1
			}
			if words[i]&^keep != 0 {
				return fmt.Errorf("%w: window: hit bits set outside the %d filled slots", ErrState, count)
			}
		}
		hits += bits.OnesCount64(words[i])
	}
	*w = Window{words: words, size: int(size), next: int(next), count: int(count), hits: hits}
	return nil
}

// EWCoverage is an exponentially weighted coverage: each sample's weight
// halves every HalfLife samples, so it follows recent coverage faster than a
// long Window while remembering the past. The zero EWCoverage is not usable:
// build one with NewEWCoverage.
type EWCoverage struct {
	decay  float64 // weight kept per sample, 2^(-1/halfLife)
	sum    float64 // weighted hits
	weight float64 // total weight
}

// NewEWCoverage returns an empty exponentially weighted coverage whose
// weights halve every halfLife samples; it panics unless halfLife is positive
// and finite.
func NewEWCoverage(halfLife float64) *EWCoverage {
	if !(halfLife > 0) || math.IsInf(halfLife, 0) {
		panic("conformal: NewEWCoverage needs a positive finite half-life")
	}
	return &EWCoverage{decay: math.Exp2(-1 / halfLife)}
}

// Add records one outcome.
func (e *EWCoverage) Add(hit bool) {
	e.sum *= e.decay
	e.weight = e.weight*e.decay + 1
	if hit {
		e.sum++
	}
}

// Coverage returns the weighted share of hits, or NaN before any sample.
func (e *EWCoverage) Coverage() float64 {
	if e.weight == 0 {
		return math.NaN()
	}
	return e.sum / e.weight
}

// Weight returns the total weight, the effective number of samples: it
// approaches HalfLife/ln 2 after many samples.
func (e *EWCoverage) Weight() float64 { return e.weight }

// HalfLife returns the half-life in samples.
func (e *EWCoverage) HalfLife() float64 { return -1 / math.Log2(e.decay) }

// ewStateLen is the length of a version-1 EWCoverage state: the version byte
// and three doubles (decay, weighted hits, weight).
const ewStateLen = 1 + 3*8

// MarshalBinary encodes the state: a version byte (1), then the per-sample
// decay, the weighted hits and the total weight as little-endian doubles.
func (e *EWCoverage) MarshalBinary() ([]byte, error) {
	b := make([]byte, 0, ewStateLen)
	b = append(b, stateVersion)
	b = appendFloat(b, e.decay)
	b = appendFloat(b, e.sum)
	return appendFloat(b, e.weight), nil
}

// UnmarshalBinary replaces the state, half-life included, with one written
// by MarshalBinary. It refuses an unknown version, a wrong length or
// impossible values with an error wrapping ErrState, and leaves e unchanged
// then.
func (e *EWCoverage) UnmarshalBinary(data []byte) error {
	r, err := newStateReader("ew coverage", data, ewStateLen)
	if err != nil {
		return err
	}
	decay, sum, weight := r.float(), r.float(), r.float()
	if !(decay > 0 && decay < 1) || !(weight >= 0) || !(sum >= 0 && sum <= weight) || math.IsInf(weight, 0) {
		return fmt.Errorf("%w: ew coverage: decay %v, hits %v, weight %v are inconsistent", ErrState, decay, sum, weight)
	}
	*e = EWCoverage{decay: decay, sum: sum, weight: weight}
	return nil
}
