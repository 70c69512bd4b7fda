package model

import (
	"bytes"
	"cmp"
	"encoding/binary"
	"errors"
	"fmt"
	"math"
	"slices"

	"github.com/plumb-forecast/plumb/model/qr"
	"github.com/plumb-forecast/plumb/model/wind"
)

// This file holds the forecasters' state encodings, with which the worker
// snapshots a site and restores it after a restart.
//
// # State layout
//
// Every state is little-endian: a 4-byte magic naming the forecaster, a
// uint16 format version, then a configuration blob (uint32 length, then
// the options the state is only valid under, see each MarshalBinary), then
// the forecaster's own fields. Counts are uint32, floats IEEE 754 doubles
// written bit for bit (NaN payloads and signed zeros included), strings
// and nested states a uint32 length and their bytes. The encoding is
// deterministic: the same state gives the same bytes (no map is walked,
// caches and memos are left out), so two replays can be compared by
// their states.

// Snapshotter is a forecaster whose learned state can be saved and
// restored. MarshalBinary encodes the state, deterministically (the same
// state gives the same bytes); UnmarshalBinary replaces the state of a
// forecaster built with the same options by one MarshalBinary wrote, after
// which the forecaster answers and learns exactly as the saved one would.
// UnmarshalBinary refuses, leaving the forecaster unchanged, bytes of
// another forecaster, another format version (an error wrapping
// ErrStateVersion), another configuration (ErrStateMismatch), or corrupt
// or truncated bytes; every such error wraps ErrState. It never panics.
//
// Every forecaster of Names implements it.
type Snapshotter interface {
	MarshalBinary() ([]byte, error)
	UnmarshalBinary(data []byte) error
}

// Errors of the UnmarshalBinary methods of this package's forecasters.
var (
	// ErrState is wrapped by every error of UnmarshalBinary: the bytes are
	// not a state the forecaster can take.
	ErrState = errors.New("model: invalid forecaster state")
	// ErrStateVersion is wrapped (besides ErrState) when the bytes are a
	// state of a format version this build does not read.
	ErrStateVersion = errors.New("unknown state version")
	// ErrStateMismatch is wrapped (besides ErrState) when the bytes are a
	// state of a forecaster with other options (kind, lead buckets,
	// windows, levels...) than the one restoring it.
	ErrStateMismatch = errors.New("state of another configuration")
)

// Magics and format versions of the states.
const (
	baselineMagic       = "pmBL"
	climatologyMagic    = "pmCL"
	persistenceMagic    = "pmPE"
	stackMagic          = "pmST"
	baselineStateVer    = 1
	climatologyStateVer = 1
	persistenceStateVer = 1
	stackStateVer       = 1
)

// stateWriter appends the fields of a state.
type stateWriter struct{ b []byte }

func newStateWriter(magic string, version uint16, size int) *stateWriter {
	w := &stateWriter{b: make([]byte, 0, 6+size)}
	w.b = append(w.b, magic...)
	w.b = binary.LittleEndian.AppendUint16(w.b, version)
	return w
}

func (w *stateWriter) u8(v byte)     { w.b = append(w.b, v) }
func (w *stateWriter) u32(v int)     { w.b = binary.LittleEndian.AppendUint32(w.b, uint32(v)) }
func (w *stateWriter) u64(v uint64)  { w.b = binary.LittleEndian.AppendUint64(w.b, v) }
func (w *stateWriter) i64(v int64)   { w.u64(uint64(v)) }
func (w *stateWriter) f64(v float64) { w.u64(math.Float64bits(v)) }
func (w *stateWriter) bool(v bool) {
	if v {
		w.u8(1)
	} else {
		w.u8(0)
	}
}
func (w *stateWriter) str(s string) { w.u32(len(s)); w.b = append(w.b, s...) }
func (w *stateWriter) blob(p []byte) {
	w.u32(len(p))
	w.b = append(w.b, p...)
}
func (w *stateWriter) floats(v []float64) {
	for _, x := range v {
		w.f64(x)
	}
}
func (w *stateWriter) ints(v []int) {
	w.u32(len(v))
	for _, x := range v {
		w.i64(int64(x))
	}
}

// stateReader reads the fields of a state. The first failure sticks: later
// reads return zero values, and err tells what went wrong. It never reads
// past the end, and checks a count against the bytes left before a slice
// is allocated for it.
type stateReader struct {
	kind string
	b    []byte
	err  error
}

// openState checks the magic and the version of a state of the named kind.
func openState(kind, magic string, version uint16, data []byte) *stateReader {
	r := &stateReader{kind: kind}
	switch {
	case len(data) < 6 || string(data[:4]) != magic:
		r.err = fmt.Errorf("%w: %s: not a %s state", ErrState, kind, kind)
	case binary.LittleEndian.Uint16(data[4:]) != version:
		r.err = fmt.Errorf("%w: %w: %s: version %d, this build reads version %d",
			ErrState, ErrStateVersion, kind, binary.LittleEndian.Uint16(data[4:]), version)
	default:
		r.b = data[6:]
	}
	return r
}

// fail records the first failure.
func (r *stateReader) fail(format string, args ...any) {
	if r.err == nil {
		r.err = fmt.Errorf("%w: %s: %s", ErrState, r.kind, fmt.Sprintf(format, args...))
	}
}

// mismatch records a configuration mismatch.
func (r *stateReader) mismatch(format string, args ...any) {
	if r.err == nil {
		r.err = fmt.Errorf("%w: %w: %s: %s", ErrState, ErrStateMismatch, r.kind, fmt.Sprintf(format, args...))
	}
}

// take returns the next n bytes, or nil after a failure.
func (r *stateReader) take(n int) []byte {
	if r.err != nil {
		return nil
	}
	if n < 0 || n > len(r.b) {
		r.fail("truncated")
		return nil
	}
	p := r.b[:n:n]
	r.b = r.b[n:]
	return p
}

func (r *stateReader) u8() byte {
	if p := r.take(1); p != nil {
		return p[0]
	}
	return 0
}

func (r *stateReader) bool() bool {
	switch v := r.u8(); v {
	case 0:
		return false
	case 1:
		return true
	default:
		r.fail("flag %d is not 0 or 1", v)
		return false
	}
}

func (r *stateReader) u32() uint32 {
	if p := r.take(4); p != nil {
		return binary.LittleEndian.Uint32(p)
	}
	return 0
}

func (r *stateReader) u64() uint64 {
	if p := r.take(8); p != nil {
		return binary.LittleEndian.Uint64(p)
	}
	return 0
}

func (r *stateReader) i64() int64   { return int64(r.u64()) }
func (r *stateReader) f64() float64 { return math.Float64frombits(r.u64()) }

// count reads a uint32 count of elements of elem bytes each, and fails if
// it exceeds limit or the bytes left.
func (r *stateReader) count(elem, limit int) int {
	n := int(r.u32())
	if r.err != nil {
		return 0
	}
	if n > limit || n*elem > len(r.b) {
		r.fail("count %d exceeds %d or the %d bytes left", n, limit, len(r.b))
		return 0
	}
	return n
}

// nonNeg reads an int64 that must lie in [0, limit].
func (r *stateReader) nonNeg(what string, limit int) int {
	v := r.i64()
	if r.err == nil && (v < 0 || v > int64(limit)) {
		r.fail("%s %d is outside [0, %d]", what, v, limit)
		return 0
	}
	return int(v)
}

func (r *stateReader) blob() []byte { return r.take(int(r.u32())) }
func (r *stateReader) str() string  { return string(r.blob()) }

func (r *stateReader) floats(dst []float64) {
	p := r.take(8 * len(dst))
	if p == nil {
		return
	}
	for i := range dst {
		dst[i] = math.Float64frombits(binary.LittleEndian.Uint64(p[8*i:]))
	}
}

// config reads the configuration blob and compares it with want.
func (r *stateReader) config(want []byte) {
	got := r.blob()
	if r.err == nil && !bytes.Equal(got, want) {
		r.mismatch("written with other options")
	}
}

// done fails if bytes are left, and returns the first failure.
func (r *stateReader) done() error {
	if r.err == nil && len(r.b) != 0 {
		r.fail("%d trailing bytes", len(r.b))
	}
	return r.err
}

// curve reads a wind.Curve state (blob) whose options must be o.
func (r *stateReader) curve(o wind.CurveOptions) *wind.Curve {
	c := &wind.Curve{}
	p := r.blob()
	if r.err != nil {
		return c
	}
	if err := c.UnmarshalBinary(p); err != nil {
		r.fail("%v", err)
	} else if c.Options() != o {
		r.mismatch("a wind curve with other options")
	}
	return c
}

// edges writes lead bucket edges.
func (w *stateWriter) edges(b Buckets) { w.ints(b.Edges) }

// Baseline

// config returns the options a Baseline state is only valid under: the
// site kind, the lead bucket edges, the residual window, MinResiduals,
// CurveHalfLife, and the number of curve bins.
func (b *Baseline) config() []byte {
	w := &stateWriter{}
	w.str(string(b.kind))
	w.edges(b.o.Buckets)
	w.u32(b.o.Window)
	w.u32(b.o.MinResiduals)
	w.f64(b.o.CurveHalfLife)
	w.f64(b.binWidth)
	w.u32(len(b.binMean))
	return w.b
}

// MarshalBinary implements Snapshotter. After the header and the
// configuration blob (see config): the curve's bin means and counts
// (one double each per bin), the diurnal profile's means and counts (96
// doubles each), then each residual window, the per-class ones by lead
// bucket and class, then the pooled ones by bucket: a count and the
// residuals from the oldest. The windows' sorted orders are not written:
// UnmarshalBinary rebuilds them as adding the residuals in turn would.
// It fails if a window holds a NaN, which no valid input puts there.
func (b *Baseline) MarshalBinary() ([]byte, error) {
	cfg := b.config()
	nRings := b.o.Buckets.Len() * (nClasses + 1)
	w := newStateWriter(baselineMagic, baselineStateVer, len(cfg)+16*len(b.binMean)+16*96+nRings*(4+8*b.o.Window))
	w.blob(cfg)
	w.floats(b.binMean)
	w.floats(b.binN)
	w.floats(b.profile[:])
	w.floats(b.profileN[:])
	var err error
	if b.pools16 != nil {
		err = appendRings(w, b.pools16, b.all16)
	} else {
		err = appendRings(w, b.pools32, b.all32)
	}
	if err != nil {
		return nil, err
	}
	return w.b, nil
}

// appendRings writes residual windows, each as a count and its values from
// the oldest.
func appendRings[I ringIndex](w *stateWriter, sets ...[]sortedRing[I]) error {
	for _, rings := range sets {
		for i := range rings {
			r := &rings[i]
			n := len(r.order)
			w.u32(n)
			for k := range n {
				v := float64(r.ring[(r.head+k)%len(r.ring)])
				if math.IsNaN(v) {
					return errors.New("model: baseline: marshal: a residual window holds NaN")
				}
				w.f64(v) // exact: a float32 widens without loss
			}
		}
	}
	return nil
}

// readRings reads residual windows written by appendRings into empty ones.
// Adding a value puts it before the values equal to it, so the order of a
// window is its values sorted, ties newest first: a stable sort of the
// values listed newest first rebuilds it (signed zeros included).
func readRings[I ringIndex](r *stateReader, window int, sets ...[]sortedRing[I]) {
	for _, rings := range sets {
		for i := range rings {
			g := &rings[i]
			n := r.count(8, window)
			for k := range n {
				// Written from float32 values this is exact; a state
				// written when the windows held float64 is rounded.
				v := r.f64()
				if r.err != nil {
					return
				}
				if math.IsNaN(v) || math.Abs(v) > math.MaxFloat32 {
					r.fail("a residual window holds %v", v)
					return
				}
				g.ring[k] = float32(v)
			}
			order := g.order[:n]
			for k := range order {
				order[k] = I(n - 1 - k)
			}
			slices.SortStableFunc(order, func(a, c I) int { return cmp.Compare(g.ring[a], g.ring[c]) })
			g.order, g.head = order, 0
		}
	}
}

// UnmarshalBinary implements Snapshotter. b must have been built with the
// options of the saved one (kind, buckets, Window, MinResiduals,
// CurveHalfLife).
func (b *Baseline) UnmarshalBinary(data []byte) error {
	r := openState("baseline", baselineMagic, baselineStateVer, data)
	r.config(b.config())
	if r.err != nil {
		return r.err
	}
	next := NewBaseline(b.kind, b.o)
	r.floats(next.binMean)
	r.floats(next.binN)
	r.floats(next.profile[:])
	r.floats(next.profileN[:])
	for _, n := range slices.Concat(next.binN, next.profileN[:]) {
		if r.err == nil && !(n >= 0 && n <= 1<<53 && n == math.Trunc(n)) {
			r.fail("count %v is not a whole number >= 0", n)
		}
	}
	if next.pools16 != nil {
		readRings(r, next.o.Window, next.pools16, next.all16)
	} else {
		readRings(r, next.o.Window, next.pools32, next.all32)
	}
	if err := r.done(); err != nil {
		return err
	}
	*b = *next
	return nil
}

// Residual pools of the reference forecasters

// appendPool writes a residualPool: a count, the values from the oldest
// (each after its interval start when starts is not nil) and the sorted
// values (which can differ from the sorted window in the signs of zeros,
// see residualPool.dropOldest, so are written as they are).
func appendPool(w *stateWriter, p *residualPool, starts []int64) {
	n := p.len()
	w.u32(n)
	for k := range n {
		i := (p.head + k) % len(p.ring)
		if starts != nil {
			w.i64(starts[i])
		}
		w.f64(p.ring[i])
	}
	w.floats(p.sorted)
}

// readPool reads a pool written by appendPool into an empty one. The values
// must be finite (the forecasters learn no other) and the sorted values
// must be the window's, sorted.
func readPool(r *stateReader, p *residualPool, starts []int64) {
	elem := 16
	if starts != nil {
		elem = 24
	}
	n := r.count(elem, len(p.ring))
	for k := range n {
		if starts != nil {
			starts[k] = r.i64()
		}
		p.ring[k] = r.f64()
	}
	p.sorted = p.sorted[:n]
	r.floats(p.sorted)
	if r.err != nil {
		p.sorted = p.sorted[:0]
		return
	}
	win := slices.Clone(p.ring[:n])
	slices.Sort(win)
	for k, v := range p.sorted {
		if !Finite(v) || !Finite(win[k]) || v != win[k] {
			r.fail("a window's sorted values are not its values sorted, or not finite")
			p.sorted = p.sorted[:0]
			return
		}
	}
	p.head = 0
}

// Climatology

// config: the number of days kept.
func (c *Climatology) config() []byte {
	w := &stateWriter{}
	w.u32(c.o.Days)
	return w.b
}

// MarshalBinary implements Snapshotter. After the header and the
// configuration blob (Days): the start (unix minutes, int64) of the latest
// interval learned and whether there is one (a byte), the pooled window,
// then the count of slots with a window and each, in the order they were
// made: its minute of the day (uint32) and its window. A window is a count,
// then per value from the oldest its interval's start (int64) and the
// value, then the values sorted.
func (c *Climatology) MarshalBinary() ([]byte, error) {
	cfg := c.config()
	w := newStateWriter(climatologyMagic, climatologyStateVer, len(cfg)+32*c.all.pool.len()+len(c.active)*(8+24*c.o.Days))
	w.blob(cfg)
	w.i64(c.latest)
	w.bool(c.seen)
	appendPool(w, &c.all.pool, c.all.start)
	w.u32(len(c.active))
	for _, k := range c.active {
		w.u32(k)
		s := c.slots[k]
		appendPool(w, &s.pool, s.start)
	}
	return w.b, nil
}

// UnmarshalBinary implements Snapshotter; c must have been built with the
// saved one's Days.
func (c *Climatology) UnmarshalBinary(data []byte) error {
	r := openState("climatology", climatologyMagic, climatologyStateVer, data)
	r.config(c.config())
	if r.err != nil {
		return r.err
	}
	next := NewClimatology(c.o)
	next.latest = r.i64()
	next.seen = r.bool()
	readPool(r, &next.all.pool, next.all.start)
	n := r.count(4, minutesPerDay)
	for range n {
		k := int(r.u32())
		if r.err != nil {
			break
		}
		if k >= minutesPerDay || next.slots[k] != nil {
			r.fail("slot %d is out of range or given twice", k)
			break
		}
		p := newDatedPool(next.o.Days)
		readPool(r, &p.pool, p.start)
		next.slots[k] = &p
		next.active = append(next.active, k)
	}
	if err := r.done(); err != nil {
		return err
	}
	*c = *next
	return nil
}

// Persistence

// config: the lead bucket edges, Window and MinErrors.
func (p *Persistence) config() []byte {
	w := &stateWriter{}
	w.edges(p.o.Buckets)
	w.u32(p.o.Window)
	w.u32(p.o.MinErrors)
	return w.b
}

// MarshalBinary implements Snapshotter. After the header and the
// configuration blob (bucket edges, Window, MinErrors): the running mean
// of the outcomes and its count (doubles), the pooled window of errors,
// then each lead bucket's. A window is a count, the errors from the oldest,
// then the errors sorted.
func (p *Persistence) MarshalBinary() ([]byte, error) {
	cfg := p.config()
	w := newStateWriter(persistenceMagic, persistenceStateVer, len(cfg)+16+(len(p.buckets)+1)*(4+16*p.o.Window))
	w.blob(cfg)
	w.f64(p.mean)
	w.f64(p.n)
	appendPool(w, &p.all, nil)
	for i := range p.buckets {
		appendPool(w, &p.buckets[i], nil)
	}
	return w.b, nil
}

// UnmarshalBinary implements Snapshotter; p must have been built with the
// saved one's options.
func (p *Persistence) UnmarshalBinary(data []byte) error {
	r := openState("persistence", persistenceMagic, persistenceStateVer, data)
	r.config(p.config())
	if r.err != nil {
		return r.err
	}
	next := NewPersistence(p.o)
	next.mean, next.n = r.f64(), r.f64()
	if r.err == nil && (!Finite(next.mean) || !(next.n >= 0 && next.n <= 1<<53 && next.n == math.Trunc(next.n))) {
		r.fail("mean %v of %v outcomes", next.mean, next.n)
	}
	readPool(r, &next.all, nil)
	for i := range next.buckets {
		readPool(r, &next.buckets[i], nil)
	}
	if err := r.done(); err != nil {
		return err
	}
	*p = *next
	return nil
}

// Stack

// config: the site kind and location, the lead bucket edges, the grid of
// levels, and every option that changes what the Stack learns or answers
// (the forest's but Workers, MinRows, MaxRows, RefitGrowth, RefitRows,
// InstallAfter; not CacheRows).
func (s *Stack) config() []byte {
	w := &stateWriter{}
	w.str(string(s.kind))
	w.bool(s.hasLoc)
	w.f64(s.lat)
	w.f64(s.lon)
	w.edges(s.buckets)
	w.u32(len(s.grid))
	w.floats(s.grid)
	f := s.o.Forest
	for _, v := range []int{f.Trees, f.MinLeaf, f.MaxFeatures, f.MaxDepth, s.o.MinRows, s.o.MaxRows, s.o.RefitRows, s.o.InstallAfter} {
		w.i64(int64(v))
	}
	w.f64(f.SampleFraction)
	w.bool(f.WithoutReplacement)
	w.u64(f.Seed)
	w.f64(s.o.RefitGrowth)
	if s.o.Learner != LearnerForest {
		w.str(s.o.Learner)
		w.i64(int64(s.o.Analog.K))
	}
	if s.tilted {
		w.str("plane")
		w.f64(s.tilt)
		w.f64(s.az)
	}
	return w.b
}

// MarshalBinary implements Snapshotter. The forests are not written: the
// state records where the training ring stood when the forest in use and
// the fit in flight were launched, and keeps the rows they were grown on,
// from which UnmarshalBinary grows them again (forest.Fit is
// deterministic). After the header and the configuration blob:
//
//	base       nested Baseline state (blob)
//	curve      wind sites: a byte 1, the wind.Curve state (blob), then, with
//	           a forest in use, a byte 1 and the state of the curve as it
//	           stood when that forest was put in use (blob), else 0; PV: 0
//	cols       the site's weather columns: count, then strings
//	ring       rows ever added (int64), first row written (int64), then
//	           each row from it on: its p features and its outcome (doubles)
//	refit      rows added since the last launch, rows it used (int64 each)
//	in use     a byte 1, its launch's row count and rows used (int64 each); or 0
//	in flight  a byte 1, the same, and the settlements it has waited (int64); or 0
//	fits       forests put in use (int64), the latest fit error's text (string)
//	corr       count, then each online quantile regression's state (blob)
//
// The rows written are those the next fit, the forest in use and the fit
// in flight need: from the oldest of their first rows on. MarshalBinary
// fails if they are no longer held, which happens only when fits have
// failed for longer than the ring's slack (a forest is kept in use
// while the later fits fail).
func (s *Stack) MarshalBinary() ([]byte, error) {
	base, err := s.base.MarshalBinary()
	if err != nil {
		return nil, fmt.Errorf("model: stack: marshal: %w", err)
	}
	var curve, fcurve []byte
	if s.curve != nil {
		if curve, err = s.curve.MarshalBinary(); err != nil {
			return nil, fmt.Errorf("model: stack: marshal: %w", err)
		}
	}
	if s.fcurve != nil {
		if fcurve, err = s.fcurve.MarshalBinary(); err != nil {
			return nil, fmt.Errorf("model: stack: marshal: %w", err)
		}
	}
	lo := s.trTotal - min(s.trTotal, s.o.MaxRows)
	if s.forest != nil {
		lo = min(lo, s.inst.at-s.inst.n)
	}
	if s.fitCh != nil {
		lo = min(lo, s.flight.at-s.flight.n)
	}
	if held := max(s.trLo, s.trTotal-s.ringRows()); lo < held {
		return nil, fmt.Errorf("model: stack: marshal: the rows of a forest from row %d on are no longer held (the ring starts at row %d)", lo, held)
	}
	corr := make([][]byte, len(s.corr))
	size := 0
	for i, c := range s.corr {
		if corr[i], err = c.MarshalBinary(); err != nil {
			return nil, fmt.Errorf("model: stack: marshal: %w", err)
		}
		size += 4 + len(corr[i])
	}
	cfg := s.config()
	w := newStateWriter(stackMagic, stackStateVer, len(cfg)+len(base)+len(curve)+size+8*(s.trTotal-lo)*(s.p+1)+256)
	w.blob(cfg)
	w.blob(base)
	w.bool(s.curve != nil)
	if s.curve != nil {
		w.blob(curve)
		w.bool(s.fcurve != nil)
		if s.fcurve != nil {
			w.blob(fcurve)
		}
	}
	w.u32(len(s.cols))
	for _, c := range s.cols {
		w.str(c)
	}
	w.i64(int64(s.trTotal))
	w.i64(int64(lo))
	c := s.ringRows()
	for i := lo; i < s.trTotal; i++ {
		k := i % c
		w.floats(s.trX[k*s.p : (k+1)*s.p])
		w.f64(s.trY[k])
	}
	w.i64(int64(s.added))
	w.i64(int64(s.lastN))
	w.bool(s.forest != nil)
	if s.forest != nil {
		w.i64(int64(s.inst.at))
		w.i64(int64(s.inst.n))
	}
	w.bool(s.fitCh != nil)
	if s.fitCh != nil {
		w.i64(int64(s.flight.at))
		w.i64(int64(s.flight.n))
		w.i64(int64(s.fitAge))
	}
	w.i64(int64(s.fits))
	if s.fitErr != nil {
		w.str(s.fitErr.Error())
	} else {
		w.str("")
	}
	w.u32(len(corr))
	for _, b := range corr {
		w.blob(b)
	}
	return w.b, nil
}

// maxStateRows bounds the rows ever added that a state may claim, so that
// counts stay far from overflowing an int.
const maxStateRows = 1 << 40

// UnmarshalBinary implements Snapshotter; s must have been built for the
// saved one's site with its Setup and options. It grows the forest in use
// again before it returns (the cost of one fit), and relaunches the fit
// that was in flight, with the settlements it had waited, so that its
// forest is put in use at the same settlement as it would have been.
func (s *Stack) UnmarshalBinary(data []byte) error {
	r := openState("stack", stackMagic, stackStateVer, data)
	r.config(s.config())
	if r.err != nil {
		return r.err
	}
	next := *s
	next.base = NewBaseline(s.kind, BaselineOptions{Buckets: s.buckets})
	if err := next.base.UnmarshalBinary(r.blob()); err != nil && r.err == nil {
		r.err = err // wraps ErrState, and ErrStateVersion or ErrStateMismatch if it is either
	}
	hasCurve := r.bool()
	switch {
	case r.err != nil:
	case hasCurve != (s.curve != nil):
		r.fail("a wind curve where none is kept, or none where one is")
	case hasCurve:
		next.curve = r.curve(s.curve.Options())
		next.fcurve = nil
		if r.bool() {
			next.fcurve = r.curve(s.curve.Options())
		}
	}
	next.cols = nil
	for range r.count(4, 1<<16) {
		next.cols = append(next.cols, r.str())
	}
	next.p, next.fx = 0, nil
	if len(next.cols) > 0 {
		next.setCols(next.cols)
	}
	next.colKey, next.colMap = nil, nil
	total := r.nonNeg("rows added", maxStateRows)
	lo := r.nonNeg("first row written", total)
	c := next.ringRows()
	rows := total - lo
	switch {
	case r.err != nil:
	case next.p == 0 && total > 0:
		r.fail("%d rows without weather columns", total)
	case rows > c || rows*8*(next.p+1) > len(r.b):
		r.fail("%d rows, more than the ring's %d or the bytes left", rows, c)
	case lo > total-min(total, next.o.MaxRows):
		r.fail("rows from %d of %d, fewer than the next fit needs", lo, total)
	}
	if r.err != nil {
		return r.err
	}
	held := min(total, c)
	next.trX, next.trY = make([]float64, held*next.p, max(held, 1024)*next.p), make([]float64, held)
	for i := lo; i < total; i++ {
		k := i % c
		r.floats(next.trX[k*next.p : (k+1)*next.p])
		next.trY[k] = r.f64()
	}
	next.trTotal, next.trLo = total, lo
	next.added = r.nonNeg("rows added since the last fit", total)
	next.lastN = r.nonNeg("rows of the last fit", next.o.MaxRows)
	launch := func(what string) fitLaunch {
		l := fitLaunch{at: r.nonNeg(what+" launch", total)}
		l.n = r.nonNeg(what+" rows", next.o.MaxRows)
		if r.err == nil && (l.n != min(l.at, next.o.MaxRows) || l.n < 1 || l.at-l.n < lo) {
			r.fail("%s launched at row %d on %d rows, which are not the latest or not held", what, l.at, l.n)
		}
		return l
	}
	hasForest := r.bool()
	next.inst = fitLaunch{}
	if hasForest {
		next.inst = launch("forest in use")
	}
	inFlight := r.bool()
	next.flight, next.fitAge = fitLaunch{}, 0
	if inFlight {
		next.flight = launch("fit in flight")
		next.fitAge = r.nonNeg("age of the fit in flight", next.o.InstallAfter-1)
	}
	if r.err == nil && s.curve != nil && (next.fcurve != nil) != hasForest {
		r.fail("a forest in use without the curve it reads, or a curve without a forest")
	}
	next.fits = r.nonNeg("forests put in use", maxStateRows)
	if r.err == nil && hasForest && next.fits < 1 {
		r.fail("a forest in use but none put in use")
	}
	next.fitErr = nil
	if msg := r.str(); msg != "" {
		next.fitErr = errors.New(msg)
	}
	next.corr = make([]*qr.Online, len(s.corr))
	if n := r.count(4, len(s.corr)); r.err == nil && n != len(s.corr) {
		r.mismatch("%d online regressions, want %d", n, len(s.corr))
	}
	g := len(s.grid)
	for i := range next.corr {
		if r.err != nil {
			break
		}
		m := &qr.Online{}
		if err := m.UnmarshalBinary(r.blob()); err != nil {
			r.fail("online regression %d: %v", i, err)
		} else if m.Tau() != s.grid[i%g] {
			r.mismatch("online regression %d at level %v, want %v", i, m.Tau(), s.grid[i%g])
		}
		next.corr[i] = m
	}
	if err := r.done(); err != nil {
		return err
	}
	next.forest, next.fitCh = nil, nil
	if hasForest {
		X, y := next.fitRows(next.inst)
		f, err := grow(X, next.p, y, next.o)
		if err != nil {
			return fmt.Errorf("%w: stack: growing the forest in use again: %v", ErrState, err)
		}
		next.forest = f
	}
	// Caches and memos start empty: they hold for the rows and the
	// forest of the Stack they were made by.
	next.cache = make(map[*WeatherRow]int32)
	next.slab = nil
	next.sun = [2]sunDay{}
	next.memo = stackMemo{q: make([]float64, g)}
	next.pair, next.one, next.plan, next.potTab = stackPair{}, stackOne{}, gridPlan{}, nil
	next.cw, next.cwGen = nil, nil
	*s = next
	if inFlight {
		s.launch(s.flight, s.fitAge)
	}
	return nil
}

// Every forecaster of Names is a Snapshotter.
var (
	_ Snapshotter = (*Baseline)(nil)
	_ Snapshotter = (*Climatology)(nil)
	_ Snapshotter = (*Persistence)(nil)
	_ Snapshotter = (*Stack)(nil)
)

// Fitting reports whether a forest is being grown: launched, and not yet
// put in use.
func (s *Stack) Fitting() bool { return s.fitCh != nil }
