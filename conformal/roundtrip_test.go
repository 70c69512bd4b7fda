package conformal

import (
	"bytes"
	"encoding"
	"testing"
)

// stateful is a part of the calibration state that saves and restores itself.
type stateful interface {
	encoding.BinaryMarshaler
	encoding.BinaryUnmarshaler
}

// roundTrip is the body of the state fuzzers: it decodes data into s and,
// when s accepts it, checks that s encodes it back to the same bytes. It
// reports whether s accepted the data.
func roundTrip(t *testing.T, s stateful, data []byte) bool {
	t.Helper()
	if s.UnmarshalBinary(data) != nil {
		return false
	}
	again, _ := s.MarshalBinary()
	if !bytes.Equal(again, data) {
		t.Errorf("accepted % x but encodes it as % x", data, again)
	}
	return true
}
