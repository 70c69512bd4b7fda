package worker

// This file holds the reorder window (Config.Reorder): inputs held back and
// applied in event-time order, so that inputs that arrive shuffled within
// the window leave a site in the same state as inputs that arrive in order.

import (
	"bytes"
	"slices"
	"time"

	"github.com/plumb-forecast/plumb/stream"
)

// heldInput is an input message held by the reorder window: its kind
// (stream.InputWeather or stream.InputMeter), subject and payload, and its
// event time (the latest issue time of its runs, or the latest end of its
// readings).
type heldInput struct {
	kind    stream.InputKind
	subject string
	data    []byte
	key     time.Time
}

// before orders held inputs: by event time, then readings before runs (at
// the same instant a reading is the older news), then by payload, so that
// the order never depends on the order of arrival.
func (x *heldInput) before(y *heldInput) int {
	if c := x.key.Compare(y.key); c != 0 {
		return c
	}
	if x.kind != y.kind {
		if x.kind == stream.InputMeter {
			return -1
		}
		return 1
	}
	return bytes.Compare(x.data, y.data)
}

// hold adds in to the actor's held inputs and returns, in order, those the
// window lets go: every input whose event time is at most the latest event
// time held or seen minus the window. An input already that far behind is
// let go at once, with those held before it in order. The returned slice is
// reused by the next call.
func (a *Actor) hold(in heldInput) []heldInput {
	in.data = slices.Clone(in.data)
	if in.key.After(a.heldMax) {
		a.heldMax = in.key
	}
	i, _ := slices.BinarySearchFunc(a.held, &in, func(h heldInput, x *heldInput) int { return h.before(x) })
	a.held = slices.Insert(a.held, i, in)
	mark := a.heldMax.Add(-a.cfg.Reorder)
	n := 0
	for n < len(a.held) && !a.held[n].key.After(mark) {
		n++
	}
	a.released = append(a.released[:0], a.held[:n]...)
	clear(a.held[:n])
	a.held = slices.Delete(a.held, 0, n)
	return a.released
}

// Held returns the number of inputs the reorder window holds back.
func (a *Actor) Held() int { return len(a.held) }
