package worker

// This file holds the actor's snapshot: the encoding of everything in an
// actor that shapes its future outputs, so that a restarted worker restores
// each actor and replays the input stream from the snapshot's sequence,
// and ends in the state a run without the restart would be in.
//
// # Layout, format version 7
//
// All integers are little-endian; a float is its IEEE 754 bits (NaN
// payloads and signed zeros kept); a time is its Unix seconds (int64) and
// nanoseconds (uint32), the zero time or one in the years 1900 to 2299,
// restored in UTC; a string or a nested state is a uint32 length and its
// bytes; a count is a uint32.
//
//	magic        "PLSN"
//	version      uint16, 7
//	site         the site's id, then its kind (strings)
//	levels       count, then the quantile levels (floats)
//	buckets      count, then the lead bucket edges (int64)
//	calibrator   the calibrator's method name (string)
//	forecaster   the forecaster's name (string)
//	seq          the last input-stream sequence the state covers (uint64)
//	clock        now, the latest meter interval's end, the first meter
//	             interval's start (times); when each quarter-hour of the day
//	             last showed output (96 times); the latest power and
//	             availability (floats); the step learned from the inputs
//	             (int64)
//	runs         count of runs, count of those kept (the first ones, by
//	             issue time); each run: site, issue time, source, count and
//	             variable names, count of rows, each: valid start (time),
//	             minutes (int64), count and values (floats). The runs past
//	             the kept ones are runs no longer kept that pending
//	             forecasts still hold rows of, in the order the pending
//	             forecasts below first refer to them.
//	seen         count, then the interval starts applied (unix minutes, int64)
//	night        count, then per interval start (int64) a night flag (byte)
//	pending      count of target intervals; each: its start (unix minutes,
//	             int64), minutes (int64), count of pending forecasts, each:
//	             its lead bucket (uint32), the features of the forecast kept
//	             for calibration and learning (see below), the raw
//	             quantiles then each calibrator's own quantile (floats, one
//	             per level each; the raw ones hold float32 values, and
//	             those of a night forecast, never read, are 0)
//	cells        per lead bucket, per level: the calibrator's state, the
//	             coverage monitor's state (nested), the forecasts
//	             settled, hits and raw hits (int64), and the mean
//	             correction's level and offset (floats)
//	issued       per lead bucket, the mean forecasts issued per settled
//	             interval (float, 0 before the first settlement)
//	flat         the run of equal meter readings (meter_flat): its value
//	             (float), first interval start and last interval end
//	             (times), the time its readings cover (int64, ns), readings
//	             (int64) and whether its alarm is raised (byte)
//	events       count of queued alarm events; each: site, kind, state
//	             (strings), level (float), lead bucket (string), target,
//	             observed (floats), window (int64), p-value, reference,
//	             z (floats), cells (int64), event time (time), reason
//	             (string)
//	held         the reorder window (Config.Reorder): the latest event time
//	             held or seen (time), count of inputs held; each, in order:
//	             kind (byte: 1 weather, 2 meter), subject (string), event
//	             time (time), payload (bytes)
//	model        the forecaster's state (nested, model.Snapshotter)
//	crc          CRC-32 (IEEE) of every byte before it (uint32)
//
// The features of a pending forecast are its interval's start (time), lead
// (int64), forecasts issued for the interval in the bucket (int32), the
// bucket's settlements when it was issued (int32, -1 unknown),
// availability, driver, weather run age and latest power (floats), night
// flag (byte), and the weather row it was made from: 1 + the index of its
// run in runs (uint32, 0 for none) and the row's index in the run (uint32).
//
// Version 6 is version 7 without the run of equal meter readings: it is
// read as no run, and the meter_flat check starts again at the next
// reading.
// Version 5 is version 6 without the mean forecasts issued per lead
// bucket: they are read as 0, and the first settlement of each bucket
// after the restore starts the mean again (weighing its calibrators'
// outcomes 1 until then; see issueWeight).
// Version 4 is version 5 without the bucket's settlements at issue of each
// pending forecast: they are read as unknown, and those forecasts' outcomes
// judge dtaci's experts at their miss rates then, not at issue
// (conformal.Outcome.Lag). Version 3 is version 4 without the reference, z and cells of the queued
// events (read as zero) and without the cells' mean corrections (they start
// at the calibrators' corrections). Its coverage monitors are of their own version 1,
// with window-based alarms: those are replaced by new, cleared alarms
// (conformal.Monitor.UnmarshalBinary), which judge again once they have
// seen enough outcomes. Version 2 is version 3 with, after the features of each pending forecast,
// those of the latest forecast issued for its interval in its bucket (the
// forecaster learned from those then); they are read and dropped. Version 1
// is version 2 without the held section; it is read as a snapshot with
// nothing held (written before the reorder window existed).
//
// Everything is written in a fixed order (no map is walked), so the same
// state gives the same bytes. Caches and scratch are left out and start
// empty in a restored actor (the night flags, which hold for the step they
// were computed with, are state); the calibrators' adjustments are asked
// afresh at its first refresh. The pending forecasts' record numbers are
// not kept: restored records are numbered afresh, in the order written.
//
// Not in a snapshot, and taken from the Config given to RestoreActor: the
// horizon, the step option, lateness, how far ahead an input may lie, how
// many runs are kept (a restored actor keeps the latest Config.KeepRuns of
// the runs written as kept), and the alarm options. The calibrators and
// coverage windows restore their own parameters (step sizes, window
// sizes) from their states.

import (
	"encoding"
	"encoding/binary"
	"errors"
	"fmt"
	"hash/crc32"
	"math"
	"slices"
	"sort"
	"time"

	"github.com/plumb-forecast/plumb/conformal"
	"github.com/plumb-forecast/plumb/model"
	"github.com/plumb-forecast/plumb/stream"
)

// Errors of Snapshot and RestoreActor, wrapped by the errors they return.
var (
	// ErrSnapshotVersion: the bytes are a snapshot of a format version this
	// build does not read (or hold a forecaster state of one).
	ErrSnapshotVersion = errors.New("snapshot of an unknown format version")
	// ErrSnapshotMismatch: the snapshot is of another site, or was written
	// with other levels, lead buckets, calibrator or forecaster (or
	// options of them) than the Config restoring it.
	ErrSnapshotMismatch = errors.New("snapshot of another site or configuration")
	// ErrSnapshotCorrupt: the bytes are not a snapshot, or are truncated or
	// corrupt (bad magic, checksum, length or impossible values).
	ErrSnapshotCorrupt = errors.New("corrupt snapshot")
	// ErrSnapshotUnsupported: the actor's forecaster or calibrator cannot
	// encode its state (it does not implement model.Snapshotter or
	// encoding.BinaryMarshaler and encoding.BinaryUnmarshaler).
	ErrSnapshotUnsupported = errors.New("state cannot be snapshotted")
)

const (
	snapshotMagic   = "PLSN"
	snapshotVersion = 7
	// oldestSnapshotVersion is the oldest version this build reads (and
	// migrates).
	oldestSnapshotVersion = 1
	// maxMinutes bounds a decoded interval or step length (a year).
	maxMinutes = 366 * 24 * 60
	// A decoded time is the zero time or lies in [1900, 2300), far wider
	// than the inputs an actor is given (the stream decoder takes 1990 to
	// 2199) and far enough from time.Duration's range that no sum or
	// difference of times the actor makes saturates.
	minSnapshotUnix = -2208988800 // 1900-01-01T00:00:00Z
	maxSnapshotUnix = 10413792000 // 2300-01-01T00:00:00Z
)

// snapWriter appends the fields of a snapshot.
type snapWriter struct{ b []byte }

func (w *snapWriter) u8(v byte)     { w.b = append(w.b, v) }
func (w *snapWriter) u32(v int)     { w.b = binary.LittleEndian.AppendUint32(w.b, uint32(v)) }
func (w *snapWriter) u64(v uint64)  { w.b = binary.LittleEndian.AppendUint64(w.b, v) }
func (w *snapWriter) i64(v int64)   { w.u64(uint64(v)) }
func (w *snapWriter) f64(v float64) { w.u64(math.Float64bits(v)) }
func (w *snapWriter) str(s string)  { w.u32(len(s)); w.b = append(w.b, s...) }
func (w *snapWriter) blob(p []byte) { w.u32(len(p)); w.b = append(w.b, p...) }
func (w *snapWriter) bool(v bool) {
	if v {
		w.u8(1)
	} else {
		w.u8(0)
	}
}
func (w *snapWriter) time(t time.Time) {
	w.i64(t.Unix())
	w.b = binary.LittleEndian.AppendUint32(w.b, uint32(t.Nanosecond()))
}
func (w *snapWriter) floats(v []float64) {
	for _, x := range v {
		w.f64(x)
	}
}

// Snapshot encodes the actor's state, with seq, the last input-stream
// sequence it covers, in the format of this file's doc. The same state
// gives the same bytes. It fails, with an error wrapping
// ErrSnapshotUnsupported, for a forecaster that is not a
// model.Snapshotter or a calibrator that cannot encode itself, and with
// the forecaster's error if it cannot encode its state. It does not change
// the actor; the bytes are the caller's.
func (a *Actor) Snapshot(seq uint64) ([]byte, error) {
	fs, ok := a.fc.(model.Snapshotter)
	if !ok {
		return nil, fmt.Errorf("worker: snapshot %s: %w: forecaster %q does not implement model.Snapshotter", a.site.ID, ErrSnapshotUnsupported, a.fc.Name())
	}
	fstate, err := fs.MarshalBinary()
	if err != nil {
		return nil, fmt.Errorf("worker: snapshot %s: forecaster %s: %w", a.site.ID, a.fc.Name(), err)
	}
	w := &snapWriter{b: make([]byte, 0, a.snapshotSize()+len(fstate))}
	w.b = append(w.b, snapshotMagic...)
	w.b = binary.LittleEndian.AppendUint16(w.b, snapshotVersion)
	a.writeHeader(w, seq)

	w.time(a.now)
	w.time(a.lastMeterEnd)
	w.time(a.firstMeter)
	for _, t := range a.lit {
		w.time(t)
	}
	w.f64(a.lastPower)
	w.f64(a.availability)
	w.i64(int64(a.stepMinutes))

	// The run table: the kept runs, then the runs pending forecasts still
	// refer to, in the order of first reference.
	table := make([]*model.WeatherRun, 0, len(a.runs)+2)
	index := make(map[*model.WeatherRun]int, len(a.runs)+2)
	for _, r := range a.runs {
		index[r.WeatherRun] = len(table)
		table = append(table, r.WeatherRun)
	}
	refer := func(px *pendingX) {
		if px.run != nil {
			if _, ok := index[px.run]; !ok {
				index[px.run] = len(table)
				table = append(table, px.run)
			}
		}
	}
	for _, tg := range a.pending.vals {
		for _, rec := range tg.rec {
			if rec != noRec {
				px, _, _ := a.record(rec)
				refer(px)
			}
		}
	}
	w.u32(len(table))
	w.u32(len(a.runs))
	for _, r := range table {
		writeRun(w, r)
	}

	w.u32(len(a.seen.keys))
	for _, k := range a.seen.keys {
		w.i64(k)
	}
	w.u32(len(a.night.keys))
	for i, k := range a.night.keys {
		w.i64(k)
		w.bool(a.night.vals[i])
	}

	w.u32(len(a.pending.keys))
	for i, k := range a.pending.keys {
		tg := a.pending.vals[i]
		w.i64(k)
		w.i64(int64(tg.minutes))
		n := 0
		for _, rec := range tg.rec {
			if rec != noRec {
				n++
			}
		}
		w.u32(n)
		for b, rec := range tg.rec {
			if rec == noRec {
				continue
			}
			w.u32(b)
			px, raw, pub := a.record(rec)
			if err := writePendingX(w, px, index); err != nil {
				return nil, fmt.Errorf("worker: snapshot %s: %w", a.site.ID, err)
			}
			if px.night {
				// Never read (settlement passes night forecasts over) and
				// not written by Refresh: left as a reused record had it.
				for range raw {
					w.f64(0)
				}
			} else {
				for _, v := range raw {
					w.f64(float64(v)) // exact: a float32 widens without loss
				}
			}
			w.floats(pub)
		}
	}

	for i := range a.cells {
		c := &a.cells[i]
		m, ok := c.cal.(encoding.BinaryMarshaler)
		if !ok {
			return nil, fmt.Errorf("worker: snapshot %s: %w: calibrator %q cannot encode its state", a.site.ID, ErrSnapshotUnsupported, c.cal.Name())
		}
		cs, err := m.MarshalBinary()
		if err != nil {
			return nil, fmt.Errorf("worker: snapshot %s: calibrator: %w", a.site.ID, err)
		}
		ms, err := c.mon.MarshalBinary()
		if err != nil {
			return nil, fmt.Errorf("worker: snapshot %s: monitor: %w", a.site.ID, err)
		}
		w.blob(cs)
		w.blob(ms)
		w.i64(int64(c.settled))
		w.i64(int64(c.hits))
		w.i64(int64(c.rawHits))
		w.f64(c.corrLevel)
		w.f64(c.corrOffset)
	}
	for _, m := range a.issuedMean {
		w.f64(m)
	}
	w.f64(a.flat.value)
	w.time(a.flat.start)
	w.time(a.flat.end)
	w.i64(int64(a.flat.covered))
	w.i64(int64(a.flat.n))
	w.bool(a.flat.raised)

	w.u32(len(a.events))
	for _, e := range a.events {
		w.str(e.Site)
		w.str(e.Kind)
		w.str(e.State)
		w.f64(e.Level)
		w.str(e.LeadBucket)
		w.f64(e.Target)
		w.f64(e.Observed)
		w.i64(int64(e.Window))
		w.f64(e.PValue)
		w.f64(e.Reference)
		w.f64(e.Z)
		w.i64(int64(e.Cells))
		w.time(e.EventTime)
		w.str(e.Reason)
	}

	w.time(a.heldMax)
	w.u32(len(a.held))
	for i := range a.held {
		h := &a.held[i]
		w.u8(byte(h.kind))
		w.str(h.subject)
		w.time(h.key)
		w.blob(h.data)
	}

	w.blob(fstate)
	w.b = binary.LittleEndian.AppendUint32(w.b, crc32.ChecksumIEEE(w.b))
	return w.b, nil
}

// snapshotSize estimates a snapshot's size without the forecaster's state.
func (a *Actor) snapshotSize() int {
	n := 256 + 12*(99+len(a.seen.keys)) + 9*len(a.night.keys) + 256*len(a.cells)
	for _, r := range a.runs {
		n += 64 + len(r.Rows)*(24+8*len(r.Vars))
	}
	recs := int(a.nrec) - len(a.freeRec)
	return n + 24*len(a.pending.keys) + recs*(4+2*64+16*len(a.cfg.Levels))
}

// writeHeader writes what a snapshot is only valid for, and seq.
func (a *Actor) writeHeader(w *snapWriter, seq uint64) {
	w.str(a.site.ID)
	w.str(string(a.site.Kind))
	w.u32(len(a.cfg.Levels))
	w.floats(a.cfg.Levels)
	w.u32(len(a.cfg.Buckets.Edges))
	for _, e := range a.cfg.Buckets.Edges {
		w.i64(int64(e))
	}
	w.str(a.calibratorName())
	w.str(a.fc.Name())
	w.u64(seq)
}

// calibratorName is the method name of the actor's calibrators.
func (a *Actor) calibratorName() string {
	if len(a.cells) == 0 {
		return ""
	}
	return a.cells[0].cal.Name()
}

func writeRun(w *snapWriter, r *model.WeatherRun) {
	w.str(r.Site)
	w.time(r.IssuedAt)
	w.str(r.Source)
	w.u32(len(r.Vars))
	for _, v := range r.Vars {
		w.str(v)
	}
	w.u32(len(r.Rows))
	for i := range r.Rows {
		row := &r.Rows[i]
		w.time(row.ValidStart)
		w.i64(int64(row.ValidMinutes))
		w.u32(len(row.Values))
		w.floats(row.Values)
	}
}

func writePendingX(w *snapWriter, x *pendingX, index map[*model.WeatherRun]int) error {
	w.time(x.validStart)
	w.i64(int64(x.lead))
	w.u32(int(uint32(x.issued)))
	w.u32(int(uint32(x.settledAt)))
	w.f64(x.avail)
	w.f64(x.driver)
	w.f64(x.runAge)
	w.f64(x.lastPower)
	w.bool(x.night)
	if x.run == nil {
		if x.row != nil {
			return errors.New("a pending forecast holds a weather row without its run")
		}
		w.u32(0)
		w.u32(0)
		return nil
	}
	k, ok := rowIndex(x.run, x.row)
	if !ok {
		return errors.New("a pending forecast holds a weather row that is not in its run")
	}
	w.u32(index[x.run] + 1)
	w.u32(k)
	return nil
}

// rowIndex returns the index of row in run.Rows.
func rowIndex(run *model.WeatherRun, row *model.WeatherRow) (int, bool) {
	if row == nil {
		return 0, false
	}
	// Rows are sorted by ValidStart: look there first, then everywhere.
	k := sort.Search(len(run.Rows), func(i int) bool { return !run.Rows[i].ValidStart.Before(row.ValidStart) })
	if k < len(run.Rows) && &run.Rows[k] == row {
		return k, true
	}
	for k := range run.Rows {
		if &run.Rows[k] == row {
			return k, true
		}
	}
	return 0, false
}

// snapReader reads the fields of a snapshot. The first failure sticks:
// later reads return zero values. It never reads past the end, and checks
// a count against the bytes left before allocating for it.
type snapReader struct {
	b   []byte
	err error
}

func (r *snapReader) fail(format string, args ...any) {
	if r.err == nil {
		r.err = fmt.Errorf("%w: %s", ErrSnapshotCorrupt, fmt.Sprintf(format, args...))
	}
}

func (r *snapReader) take(n int) []byte {
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

func (r *snapReader) u8() byte {
	if p := r.take(1); p != nil {
		return p[0]
	}
	return 0
}

func (r *snapReader) u32() uint32 {
	if p := r.take(4); p != nil {
		return binary.LittleEndian.Uint32(p)
	}
	return 0
}

func (r *snapReader) u64() uint64 {
	if p := r.take(8); p != nil {
		return binary.LittleEndian.Uint64(p)
	}
	return 0
}

func (r *snapReader) i64() int64   { return int64(r.u64()) }
func (r *snapReader) f64() float64 { return math.Float64frombits(r.u64()) }
func (r *snapReader) blob() []byte { return r.take(int(r.u32())) }
func (r *snapReader) str() string  { return string(r.blob()) }

func (r *snapReader) bool() bool {
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

// count reads a count of elements of at least elem bytes each, which must
// not exceed limit or the bytes left.
func (r *snapReader) count(what string, elem, limit int) int {
	n := int(r.u32())
	if r.err == nil && (n > limit || n*elem > len(r.b)) {
		r.fail("%d %s, more than %d or than the %d bytes left hold", n, what, limit, len(r.b))
		return 0
	}
	return n
}

// int reads an int64 that must lie in [lo, hi].
func (r *snapReader) int(what string, lo, hi int64) int {
	v := r.i64()
	if r.err == nil && (v < lo || v > hi) {
		r.fail("%s %d is outside [%d, %d]", what, v, lo, hi)
		return 0
	}
	return int(v)
}

func (r *snapReader) time() time.Time {
	s := r.i64()
	ns := r.u32()
	if r.err != nil {
		return time.Time{}
	}
	if ns >= 1e9 {
		r.fail("a time's nanoseconds %d exceed a second", ns)
		return time.Time{}
	}
	t := time.Unix(s, int64(ns)).UTC()
	if !t.IsZero() && (s < minSnapshotUnix || s >= maxSnapshotUnix) {
		r.fail("time %s is outside the years 1900 to 2299", t.Format(time.RFC3339))
		return time.Time{}
	}
	return t
}

func (r *snapReader) floats(dst []float64) {
	p := r.take(8 * len(dst))
	if p == nil {
		return
	}
	for i := range dst {
		dst[i] = math.Float64frombits(binary.LittleEndian.Uint64(p[8*i:]))
	}
}

// increasing reports whether keys are strictly increasing.
func increasing(keys []int64) bool {
	for i := 1; i < len(keys); i++ {
		if keys[i] <= keys[i-1] {
			return false
		}
	}
	return true
}

// RestoreActor returns the actor a snapshot holds, for site under cfg
// (which must already have its defaults, as for NewActor), and the
// input-stream sequence the snapshot covers. Fed the inputs after that
// sequence, the actor gives the bundles and alarm events, byte for byte,
// that the actor snapshotted would have given. It refuses, with an error
// wrapping ErrSnapshotVersion, ErrSnapshotMismatch or ErrSnapshotCorrupt,
// a snapshot of another format version, of another site or written with
// other levels, buckets, calibrator method or forecaster (or options
// of the forecaster), and bytes that are not a whole, sound snapshot; and
// with one wrapping ErrSnapshotUnsupported when cfg's forecaster or
// calibrator cannot restore a state. It never panics, whatever the bytes.
func RestoreActor(site model.Site, cfg Config, data []byte) (a *Actor, seq uint64, err error) {
	fail := func(err error) (*Actor, uint64, error) {
		return nil, 0, fmt.Errorf("worker: restore %s: %w", site.ID, err)
	}
	if len(data) < 6 || string(data[:4]) != snapshotMagic {
		return fail(fmt.Errorf("%w: not a snapshot (bad magic)", ErrSnapshotCorrupt))
	}
	version := binary.LittleEndian.Uint16(data[4:])
	if version < oldestSnapshotVersion || version > snapshotVersion {
		return fail(fmt.Errorf("%w: version %d, this build reads versions %d to %d", ErrSnapshotVersion, version, oldestSnapshotVersion, snapshotVersion))
	}
	if len(data) < 10 {
		return fail(fmt.Errorf("%w: %d bytes, truncated", ErrSnapshotCorrupt, len(data)))
	}
	body := data[:len(data)-4]
	if got, want := crc32.ChecksumIEEE(body), binary.LittleEndian.Uint32(data[len(data)-4:]); got != want {
		return fail(fmt.Errorf("%w: checksum %08x, want %08x", ErrSnapshotCorrupt, got, want))
	}
	a, err = NewActor(site, cfg)
	if err != nil {
		return fail(err)
	}
	fs, ok := a.fc.(model.Snapshotter)
	if !ok {
		return fail(fmt.Errorf("%w: forecaster %q does not implement model.Snapshotter", ErrSnapshotUnsupported, a.fc.Name()))
	}
	r := &snapReader{b: body[6:]}
	seq, err = a.readHeader(r)
	if err != nil {
		return fail(err)
	}
	if err := a.readState(r, fs, version); err != nil {
		return fail(err)
	}
	return a, seq, nil
}

// SnapshotSeq returns the input-stream sequence a snapshot covers, read
// from its header (the checksum is not checked: RestoreActor does).
func SnapshotSeq(data []byte) (uint64, error) {
	if len(data) < 6 || string(data[:4]) != snapshotMagic {
		return 0, fmt.Errorf("%w: not a snapshot (bad magic)", ErrSnapshotCorrupt)
	}
	if v := binary.LittleEndian.Uint16(data[4:]); v < oldestSnapshotVersion || v > snapshotVersion {
		return 0, fmt.Errorf("%w: version %d, this build reads versions %d to %d", ErrSnapshotVersion, v, oldestSnapshotVersion, snapshotVersion)
	}
	r := &snapReader{b: data[6:]}
	r.str()
	r.str()
	r.take(8 * r.count("levels", 8, 1<<16))
	r.take(8 * r.count("bucket edges", 8, 1<<16))
	r.str()
	r.str()
	seq := r.u64()
	return seq, r.err
}

// readHeader checks a snapshot's header against the actor and returns its
// sequence.
func (a *Actor) readHeader(r *snapReader) (uint64, error) {
	id, kind := r.str(), r.str()
	levels := make([]float64, r.count("levels", 8, 1<<16))
	r.floats(levels)
	edges := make([]int64, r.count("bucket edges", 8, 1<<16))
	for i := range edges {
		edges[i] = r.i64()
	}
	cal, fc := r.str(), r.str()
	seq := r.u64()
	if r.err != nil {
		return 0, r.err
	}
	mismatch := func(what string, got, want any) error {
		return fmt.Errorf("%w: written for %s %v, not %v", ErrSnapshotMismatch, what, got, want)
	}
	switch {
	case id != a.site.ID:
		return 0, mismatch("site", id, a.site.ID)
	case kind != string(a.site.Kind):
		return 0, mismatch("a site of kind", kind, a.site.Kind)
	case !slices.EqualFunc(levels, a.cfg.Levels, func(x, y float64) bool { return math.Float64bits(x) == math.Float64bits(y) }):
		return 0, mismatch("levels", levels, a.cfg.Levels)
	case !slices.EqualFunc(edges, a.cfg.Buckets.Edges, func(x int64, y int) bool { return x == int64(y) }):
		return 0, mismatch("lead bucket edges", edges, a.cfg.Buckets.Edges)
	case cal != a.calibratorName():
		return 0, mismatch("calibrator", cal, a.calibratorName())
	case fc != a.fc.Name():
		return 0, mismatch("forecaster", fc, a.fc.Name())
	}
	return seq, nil
}

// readState reads the state after the header into a, fresh from NewActor.
func (a *Actor) readState(r *snapReader, fs model.Snapshotter, version uint16) error {
	nl, nb := len(a.cfg.Levels), a.cfg.Buckets.Len()
	a.now = r.time()
	a.lastMeterEnd = r.time()
	a.firstMeter = r.time()
	for i := range a.lit {
		a.lit[i] = r.time()
	}
	a.lastPower = r.f64()
	a.availability = r.f64()
	a.stepMinutes = r.int("step minutes", 0, maxMinutes)

	nr := r.count("weather runs", 16, math.MaxInt32)
	kept := int(r.u32())
	if r.err == nil && kept > nr {
		r.fail("%d runs kept of %d", kept, nr)
	}
	table := make([]*model.WeatherRun, 0, nr)
	for range nr {
		if r.err != nil {
			break
		}
		table = append(table, readRun(r))
	}
	if r.err != nil {
		return r.err
	}
	for i := 1; i < kept; i++ {
		if table[i].IssuedAt.Before(table[i-1].IssuedAt) {
			r.fail("the kept runs are not sorted by issue time")
			return r.err
		}
	}
	a.runs = make([]run, 0, a.cfg.KeepRuns+1)
	for _, w := range table[max(0, kept-a.cfg.KeepRuns):kept] {
		a.runs = append(a.runs, a.keptRun(w))
	}

	a.seen.keys = make([]int64, r.count("intervals seen", 8, math.MaxInt32))
	for i := range a.seen.keys {
		a.seen.keys[i] = r.i64()
	}
	a.seen.vals = make([]struct{}, len(a.seen.keys))
	n := r.count("night flags", 9, math.MaxInt32)
	a.night.keys, a.night.vals = make([]int64, n), make([]bool, n)
	for i := range n {
		a.night.keys[i] = r.i64()
		a.night.vals[i] = r.bool()
	}
	if r.err == nil && (!increasing(a.seen.keys) || !increasing(a.night.keys)) {
		r.fail("interval starts out of order")
	}

	nt := r.count("pending intervals", 20, math.MaxInt32)
	a.pending.keys, a.pending.vals = make([]int64, 0, nt), make([]*target, 0, nt)
	for range nt {
		if r.err != nil {
			break
		}
		key := r.i64()
		tg := &target{minutes: r.int("interval minutes", 1, maxMinutes), rec: make([]int32, nb)}
		for b := range tg.rec {
			tg.rec[b] = noRec
		}
		m := r.count("pending forecasts", 4, nb)
		last := -1
		for range m {
			b := int(r.u32())
			if r.err != nil {
				break
			}
			if b <= last || b >= nb {
				r.fail("lead bucket %d out of order or range", b)
				break
			}
			last = b
			rec := a.newRecord()
			tg.rec[b] = rec
			px, raw, pub := a.record(rec)
			readPendingX(r, px, table, int(version))
			if version < 3 {
				// The latest forecast's features, which the forecaster
				// learned from before version 3: read and dropped.
				var latest pendingX
				readPendingX(r, &latest, table, int(version))
			}
			for k := range raw {
				// Written from float32 this is exact; written by a build
				// that kept them in float64, rounded.
				v := r.f64()
				if math.Abs(v) > math.MaxFloat32 && !math.IsInf(v, 0) {
					r.fail("raw quantile %v out of range", v)
				}
				raw[k] = float32(v)
			}
			r.floats(pub)
		}
		a.pending.keys = append(a.pending.keys, key)
		a.pending.vals = append(a.pending.vals, tg)
	}
	if r.err == nil && !increasing(a.pending.keys) {
		r.fail("pending intervals out of order")
	}

	for i := range a.cells {
		if r.err != nil {
			break
		}
		c := &a.cells[i]
		u, ok := c.cal.(encoding.BinaryUnmarshaler)
		if !ok {
			return fmt.Errorf("%w: calibrator %q cannot restore its state", ErrSnapshotUnsupported, c.cal.Name())
		}
		if err := u.UnmarshalBinary(r.blob()); err != nil && r.err == nil {
			r.fail("calibrator of bucket %d level %v: %v", i/nl, a.cfg.Levels[i%nl], err)
		}
		if err := c.mon.UnmarshalBinary(r.blob()); err != nil && r.err == nil {
			r.fail("monitor of bucket %d level %v: %v", i/nl, a.cfg.Levels[i%nl], err)
		}
		if r.err == nil && math.Float64bits(c.mon.Level) != math.Float64bits(a.cfg.Levels[i%nl]) {
			r.fail("monitor of level %v where %v is", c.mon.Level, a.cfg.Levels[i%nl])
		}
		c.settled = r.int("forecasts settled", 0, math.MaxInt64)
		c.hits = r.int("hits", 0, int64(c.settled))
		c.rawHits = r.int("raw hits", 0, int64(c.settled))
		if version >= 4 {
			c.corrLevel, c.corrOffset = r.f64(), r.f64()
			if r.err == nil && (math.IsNaN(c.corrLevel) || math.IsInf(c.corrLevel, 0) || math.IsNaN(c.corrOffset) || math.IsInf(c.corrOffset, 0)) {
				r.fail("mean correction (%v, %v) of bucket %d level %v is not finite", c.corrLevel, c.corrOffset, i/nl, a.cfg.Levels[i%nl])
			}
		} else if c.corr != nil {
			// Written before the mean correction was kept: it starts at
			// the correction now (no trend).
			c.corrLevel, c.corrOffset = c.corr.Correction()
		}
	}
	if version >= 6 {
		for b := range a.issuedMean {
			m := r.f64()
			if r.err == nil && !(m == 0 || m >= 1 && !math.IsInf(m, 0)) {
				r.fail("mean forecasts issued %v of bucket %d is neither 0 nor at least 1", m, b)
			}
			a.issuedMean[b] = m
		}
	}
	if version >= 7 {
		f := &a.flat
		f.value = r.f64()
		f.start, f.end = r.time(), r.time()
		f.covered = time.Duration(r.i64())
		f.n = r.int("flat readings", 0, math.MaxInt32)
		f.raised = r.bool()
		switch {
		case r.err != nil:
		case math.IsNaN(f.value) || math.IsInf(f.value, 0):
			r.fail("flat run value %v is not finite", f.value)
		case f.end.Before(f.start):
			r.fail("flat run ends %s before it starts %s", f.end, f.start)
		case f.covered < 0 || f.covered > f.end.Sub(f.start):
			r.fail("flat run covers %s, outside its span %s", f.covered, f.end.Sub(f.start))
		case f.raised && f.n == 0:
			r.fail("flat alarm raised without a run")
		}
	}

	ne := r.count("events", 80, math.MaxInt32)
	for range ne {
		if r.err != nil {
			break
		}
		var e conformal.Event
		e.Site, e.Kind, e.State = r.str(), r.str(), r.str()
		e.Level = r.f64()
		e.LeadBucket = r.str()
		e.Target, e.Observed = r.f64(), r.f64()
		e.Window = r.int("event window", 0, math.MaxInt32)
		e.PValue = r.f64()
		if version >= 4 {
			e.Reference, e.Z = r.f64(), r.f64()
			e.Cells = r.int("event cells", 0, math.MaxInt32)
		}
		e.EventTime = r.time()
		e.Reason = r.str()
		a.events = append(a.events, e)
	}

	if version >= 2 {
		a.heldMax = r.time()
		nh := r.count("held inputs", 25, math.MaxInt32)
		for range nh {
			if r.err != nil {
				break
			}
			h := heldInput{kind: stream.InputKind(r.u8()), subject: r.str(), key: r.time()}
			h.data = slices.Clone(r.blob())
			if r.err == nil && h.kind != stream.InputWeather && h.kind != stream.InputMeter {
				r.fail("held input of kind %d", h.kind)
			}
			if r.err == nil && len(a.held) > 0 && a.held[len(a.held)-1].before(&h) > 0 {
				r.fail("held inputs out of order")
			}
			a.held = append(a.held, h)
		}
	}

	fstate := r.blob()
	if r.err != nil {
		return r.err
	}
	if len(r.b) != 0 {
		return fmt.Errorf("%w: %d trailing bytes", ErrSnapshotCorrupt, len(r.b))
	}
	if err := fs.UnmarshalBinary(fstate); err != nil {
		switch {
		case errors.Is(err, model.ErrStateVersion):
			return fmt.Errorf("%w: forecaster: %w", ErrSnapshotVersion, err)
		case errors.Is(err, model.ErrStateMismatch):
			return fmt.Errorf("%w: forecaster: %w", ErrSnapshotMismatch, err)
		}
		return fmt.Errorf("%w: forecaster: %w", ErrSnapshotCorrupt, err)
	}
	return nil
}

// readRun reads one weather run.
func readRun(r *snapReader) *model.WeatherRun {
	w := &model.WeatherRun{Site: r.str(), IssuedAt: r.time(), Source: r.str()}
	nv := r.count("variables", 4, math.MaxInt32)
	w.Vars = make([]string, 0, nv)
	for range nv {
		w.Vars = append(w.Vars, r.str())
	}
	nrow := r.count("rows", 24, math.MaxInt32)
	if r.err != nil {
		return w
	}
	w.Rows = make([]model.WeatherRow, nrow)
	for i := range w.Rows {
		row := &w.Rows[i]
		row.ValidStart = r.time()
		row.ValidMinutes = r.int("row minutes", 0, maxMinutes)
		n := r.count("values", 8, math.MaxInt32)
		if r.err == nil && n != nv {
			r.fail("a row of %d values in a run of %d variables", n, nv)
		}
		if r.err != nil {
			break
		}
		row.Values = make([]float64, n)
		r.floats(row.Values)
	}
	return w
}

// readPendingX reads the features of a pending forecast; table is the
// run table.
func readPendingX(r *snapReader, x *pendingX, table []*model.WeatherRun, version int) {
	x.validStart = r.time()
	x.lead = r.int("lead", math.MinInt32, math.MaxInt32)
	x.issued = int32(r.u32())
	x.settledAt = -1 // unknown before version 5
	if version >= 5 {
		x.settledAt = int32(r.u32())
	}
	x.avail, x.driver, x.runAge, x.lastPower = r.f64(), r.f64(), r.f64(), r.f64()
	x.night = r.bool()
	ref, k := int(r.u32()), int(r.u32())
	if r.err != nil {
		return
	}
	switch {
	case ref == 0 && k == 0:
		x.run, x.row = nil, nil
	case ref == 0 || ref > len(table) || k >= len(table[ref-1].Rows):
		r.fail("a pending forecast refers to row %d of run %d, which is not there", k, ref)
	default:
		x.run, x.row = table[ref-1], &table[ref-1].Rows[k]
	}
}
