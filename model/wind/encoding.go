package wind

import (
	"encoding/binary"
	"errors"
	"fmt"
	"math"
)

// ErrBadSnapshot is wrapped by every error of Curve.UnmarshalBinary: the
// input is not a curve snapshot this build can read (corrupt, truncated, or
// of another version). Callers restoring state branch on it to start the
// curve afresh.
var ErrBadSnapshot = errors.New("wind: bad curve snapshot")

// Snapshot layout, little-endian:
//
//	magic "pwcv" | version uint16 | bin width float64 | max speed float64 |
//	min count uint32 | memory uint32 | bin count uint32 |
//	per bin: samples uint64, median float64, mean absolute deviation float64
const (
	snapshotMagic   = "pwcv"
	snapshotVersion = 1
	headerLen       = 4 + 2 + 8 + 8 + 4 + 4 + 4
	binLen          = 8 + 8 + 8
)

// MarshalBinary encodes the curve's options and learned state, with a
// version header, for restart snapshots. A curve restored by UnmarshalBinary
// evaluates and learns exactly as this one would.
func (c *Curve) MarshalBinary() ([]byte, error) {
	c.init()
	out := make([]byte, 0, headerLen+binLen*len(c.bins))
	out = append(out, snapshotMagic...)
	out = binary.LittleEndian.AppendUint16(out, snapshotVersion)
	out = binary.LittleEndian.AppendUint64(out, math.Float64bits(c.opt.BinWidth))
	out = binary.LittleEndian.AppendUint64(out, math.Float64bits(c.opt.MaxSpeed))
	out = binary.LittleEndian.AppendUint32(out, uint32(c.opt.MinCount))
	out = binary.LittleEndian.AppendUint32(out, uint32(c.opt.Memory))
	out = binary.LittleEndian.AppendUint32(out, uint32(len(c.bins)))
	for _, b := range c.bins {
		out = binary.LittleEndian.AppendUint64(out, b.n)
		out = binary.LittleEndian.AppendUint64(out, math.Float64bits(b.med))
		out = binary.LittleEndian.AppendUint64(out, math.Float64bits(b.mad))
	}
	return out, nil
}

// UnmarshalBinary replaces the curve by the one encoded in data by
// MarshalBinary, options included. On error, which wraps ErrBadSnapshot,
// the curve is left as it was. It never panics, whatever data holds.
func (c *Curve) UnmarshalBinary(data []byte) error {
	if len(data) < headerLen {
		return fmt.Errorf("%w: %d bytes, shorter than the %d-byte header", ErrBadSnapshot, len(data), headerLen)
	}
	if string(data[:4]) != snapshotMagic {
		return fmt.Errorf("%w: magic %q, want %q", ErrBadSnapshot, data[:4], snapshotMagic)
	}
	le := binary.LittleEndian
	if v := le.Uint16(data[4:]); v != snapshotVersion {
		return fmt.Errorf("%w: version %d, this build reads version %d", ErrBadSnapshot, v, snapshotVersion)
	}
	minCount, memory := le.Uint32(data[22:]), le.Uint32(data[26:])
	if minCount > math.MaxInt32 || memory > math.MaxInt32 {
		return fmt.Errorf("%w: min count %d or memory %d out of range", ErrBadSnapshot, minCount, memory)
	}
	o := CurveOptions{
		BinWidth: math.Float64frombits(le.Uint64(data[6:])),
		MaxSpeed: math.Float64frombits(le.Uint64(data[14:])),
		MinCount: int(minCount),
		Memory:   int(memory),
	}
	nb, err := o.check()
	if err != nil {
		return fmt.Errorf("%w: options: %w", ErrBadSnapshot, err)
	}
	if stored := le.Uint32(data[30:]); uint64(stored) != uint64(nb) {
		return fmt.Errorf("%w: %d bins stored, the options give %d", ErrBadSnapshot, stored, nb)
	}
	if want := headerLen + binLen*nb; len(data) != want {
		return fmt.Errorf("%w: %d bytes, want %d for %d bins", ErrBadSnapshot, len(data), want, nb)
	}
	var fresh Curve
	fresh.setup(o, nb)
	p := data[headerLen:]
	for i := range fresh.bins {
		b := bin{
			n:   le.Uint64(p),
			med: math.Float64frombits(le.Uint64(p[8:])),
			mad: math.Float64frombits(le.Uint64(p[16:])),
		}
		p = p[binLen:]
		if err := b.check(); err != nil {
			return fmt.Errorf("%w: bin %d: %w", ErrBadSnapshot, i, err)
		}
		fresh.bins[i] = b
		if fresh.total > math.MaxUint64-b.n {
			fresh.total = math.MaxUint64
		} else {
			fresh.total += b.n
		}
	}
	fresh.stale = true
	*c = fresh
	return nil
}

// check validates a decoded bin against what Add can produce.
func (b bin) check() error {
	if b.n == 0 {
		if b.med != 0 || b.mad != 0 || math.Signbit(b.med) || math.Signbit(b.mad) {
			return errors.New("empty bin with a nonzero estimate")
		}
		return nil
	}
	// Add keeps both within the range of its samples up to rounding; the
	// bounds are loose so that rounding never rejects a genuine snapshot.
	const lim = 4 * maxPerUnit
	if !(math.Abs(b.med) <= lim) {
		return fmt.Errorf("median %v outside [-%d, %d]", b.med, lim, lim)
	}
	if !(b.mad >= 0 && b.mad <= lim) {
		return fmt.Errorf("mean absolute deviation %v outside [0, %d]", b.mad, lim)
	}
	return nil
}
