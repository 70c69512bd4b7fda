package conformal

import (
	"encoding/binary"
	"errors"
	"fmt"
	"math"
)

// ErrState is wrapped by every error of an UnmarshalBinary method of this
// package: the bytes are not a state this build can restore (empty, an
// unknown version, a wrong length or impossible values).
var ErrState = errors.New("conformal: invalid state")

// stateVersion is the first byte of every state this build writes.
const stateVersion = 1

// appendFloat appends v as a little-endian IEEE 754 double.
func appendFloat(b []byte, v float64) []byte {
	return binary.LittleEndian.AppendUint64(b, math.Float64bits(v))
}

// stateReader reads the fields of a state after its version byte. Callers
// check the length before reading, so reads never run past the end.
type stateReader struct {
	b []byte
}

// newStateReader checks the version byte of a state of the named kind and,
// when wantLen > 0, its exact length.
func newStateReader(kind string, data []byte, wantLen int) (*stateReader, error) {
	if len(data) == 0 {
		return nil, fmt.Errorf("%w: %s: empty", ErrState, kind)
	}
	if data[0] != stateVersion {
		return nil, fmt.Errorf("%w: %s: unknown version %d (this build reads version %d)",
			ErrState, kind, data[0], stateVersion)
	}
	if wantLen > 0 && len(data) != wantLen {
		return nil, fmt.Errorf("%w: %s: %d bytes, want %d", ErrState, kind, len(data), wantLen)
	}
	return &stateReader{b: data[1:]}, nil
}

// float reads one double.
func (r *stateReader) float() float64 {
	v := math.Float64frombits(binary.LittleEndian.Uint64(r.b))
	r.b = r.b[8:]
	return v
}

// appendUint32 appends v little-endian.
func appendUint32(b []byte, v uint32) []byte { return binary.LittleEndian.AppendUint32(b, v) }

// appendUint64 appends v little-endian.
func appendUint64(b []byte, v uint64) []byte { return binary.LittleEndian.AppendUint64(b, v) }

// left returns the number of bytes not yet read.
func (r *stateReader) left() int { return len(r.b) }

// uint32 reads one little-endian uint32.
func (r *stateReader) uint32() uint32 {
	v := binary.LittleEndian.Uint32(r.b)
	r.b = r.b[4:]
	return v
}

// uint64 reads one little-endian uint64.
func (r *stateReader) uint64() uint64 {
	v := binary.LittleEndian.Uint64(r.b)
	r.b = r.b[8:]
	return v
}
