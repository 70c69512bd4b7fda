package qr

import (
	"encoding/binary"
	"errors"
	"fmt"
	"hash/crc32"
	"math"
)

// Errors returned by Online.UnmarshalBinary.
var (
	// ErrVersion: the blob is an Online state of a format version this
	// build does not read (a caller may start a fresh learner instead).
	ErrVersion = errors.New("qr: unsupported state version")
	// ErrEncoding: the blob is not an Online state, or is truncated or
	// corrupt (wrong magic, length or checksum, or impossible values).
	ErrEncoding = errors.New("qr: malformed state")
)

// Binary layout of an Online state, version 1, all little-endian:
//
//	offset  size  field
//	0       4     magic "PQRO"
//	4       2     version (1)
//	6       4     p (uint32, >= 1)
//	10      8     tau (float64)
//	18      8     rate (float64)
//	26      8     memory (int64; -1: never forget)
//	34      8     average (int64; -1: none)
//	42      8     updates (int64)
//	50      32    t, n, scale, scaleW (float64 each)
//	82      32 p  w, avg, s, g (p float64 each)
//	82+32p  4     CRC-32 (IEEE) of all preceding bytes
const (
	onlineMagic   = "PQRO"
	onlineVersion = 1
	onlineHeader  = 82
)

// MarshalBinary encodes the learner's full state (options, counters and
// weights) in a versioned binary format with a checksum; UnmarshalBinary
// restores it exactly. It fails only for an Online not made by NewOnline
// or UnmarshalBinary.
func (m *Online) MarshalBinary() ([]byte, error) {
	if m.p < 1 {
		return nil, errors.New("qr: marshal: Online was not made by NewOnline")
	}
	buf := make([]byte, 0, onlineHeader+32*m.p+4)
	le := binary.LittleEndian
	buf = append(buf, onlineMagic...)
	buf = le.AppendUint16(buf, onlineVersion)
	buf = le.AppendUint32(buf, uint32(m.p))
	for _, v := range []float64{m.tau, m.rate} {
		buf = le.AppendUint64(buf, math.Float64bits(v))
	}
	for _, v := range []int64{m.memory, m.average, m.updates} {
		buf = le.AppendUint64(buf, uint64(v))
	}
	for _, v := range []float64{m.t, m.n, m.scale, m.scaleW} {
		buf = le.AppendUint64(buf, math.Float64bits(v))
	}
	for _, arr := range [][]float64{m.w, m.avg, m.s, m.g} {
		for _, v := range arr {
			buf = le.AppendUint64(buf, math.Float64bits(v))
		}
	}
	return le.AppendUint32(buf, crc32.ChecksumIEEE(buf)), nil
}

// UnmarshalBinary replaces the learner's state with one encoded by
// MarshalBinary, including its p, level and options; it does not keep
// data. On error the learner is left unchanged. A blob of another format
// version gives an error wrapping ErrVersion; a truncated, corrupt or
// foreign blob one wrapping ErrEncoding. It never panics.
func (m *Online) UnmarshalBinary(data []byte) error {
	le := binary.LittleEndian
	if len(data) < 6 || string(data[:4]) != onlineMagic {
		return fmt.Errorf("qr: unmarshal: not an Online state (bad magic): %w", ErrEncoding)
	}
	if v := le.Uint16(data[4:6]); v != onlineVersion {
		return fmt.Errorf("qr: unmarshal: state version %d, this build reads %d: %w", v, onlineVersion, ErrVersion)
	}
	if len(data) < onlineHeader+4 {
		return fmt.Errorf("qr: unmarshal: %d bytes, truncated header: %w", len(data), ErrEncoding)
	}
	p := uint64(le.Uint32(data[6:10]))
	if want := uint64(onlineHeader) + 32*p + 4; p < 1 || uint64(len(data)) != want {
		return fmt.Errorf("qr: unmarshal: %d bytes for p = %d, want %d: %w", len(data), p, want, ErrEncoding)
	}
	body := data[:len(data)-4]
	if got, want := crc32.ChecksumIEEE(body), le.Uint32(data[len(data)-4:]); got != want {
		return fmt.Errorf("qr: unmarshal: checksum %08x, want %08x: %w", got, want, ErrEncoding)
	}

	off := 10
	f64 := func() float64 {
		v := math.Float64frombits(le.Uint64(data[off:]))
		off += 8
		return v
	}
	i64 := func() int64 {
		v := int64(le.Uint64(data[off:]))
		off += 8
		return v
	}
	n := Online{p: int(p)}
	n.tau, n.rate = f64(), f64()
	n.memory, n.average, n.updates = i64(), i64(), i64()
	n.t, n.n, n.scale, n.scaleW = f64(), f64(), f64(), f64()
	n.alloc()
	for _, arr := range [][]float64{n.w, n.avg, n.s, n.g} {
		for i := range arr {
			arr[i] = f64()
		}
	}
	if err := n.check(); err != nil {
		return fmt.Errorf("qr: unmarshal: %v: %w", err, ErrEncoding)
	}
	n.setLambda()
	*m = n
	return nil
}

// check reports a decoded state that NewOnline and Update cannot produce.
func (m *Online) check() error {
	finite := func(v float64) bool { return !math.IsNaN(v) && !math.IsInf(v, 0) }
	nonNeg := func(v float64) bool { return finite(v) && v >= 0 }
	switch {
	case !(m.tau > 0 && m.tau < 1):
		return fmt.Errorf("level %v outside (0, 1)", m.tau)
	case !(m.rate > 0) || !finite(m.rate):
		return fmt.Errorf("rate %v not positive", m.rate)
	case m.memory < 1 && m.memory != -1:
		return fmt.Errorf("memory %d", m.memory)
	case m.average < 1 && m.average != -1:
		return fmt.Errorf("average %d", m.average)
	case m.updates < 0:
		return fmt.Errorf("update count %d", m.updates)
	case !nonNeg(m.t) || !nonNeg(m.n) || !nonNeg(m.scale) || !nonNeg(m.scaleW):
		return errors.New("negative or non-finite step statistics")
	}
	for i := 0; i < m.p; i++ {
		if !finite(m.w[i]) || !finite(m.avg[i]) || !nonNeg(m.s[i]) || !nonNeg(m.g[i]) {
			return fmt.Errorf("coordinate %d holds an impossible value", i)
		}
	}
	return nil
}
