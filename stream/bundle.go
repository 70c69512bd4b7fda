package stream

import (
	"bytes"
	"encoding/binary"
	"errors"
	"fmt"
	"math"
	"slices"
	"strconv"
	"time"

	"github.com/apache/arrow-go/v18/arrow"
	"github.com/apache/arrow-go/v18/arrow/array"
	"github.com/apache/arrow-go/v18/arrow/ipc"
	"github.com/apache/arrow-go/v18/arrow/memory"

	"github.com/plumb-forecast/plumb/model"
)

// The quantile bundle on the wire (DESIGN.md, "Wire contracts") is one
// Apache Arrow IPC stream (a schema message, one record batch, the
// end-of-stream marker) per model.Bundle, published on QuantilesSubject. It
// holds one row per step and these columns, in this order, none nullable:
//
//	site           utf8
//	issued_at      timestamp[ms, tz=UTC]
//	valid_start    timestamp[ms, tz=UTC]
//	valid_minutes  int32
//	lead_minutes   int32
//	q<level>...    float64, one per level in increasing order, named by
//	               model.LevelColumn ("q0.05"), field metadata
//	               plumb.level = model.FormatLevel(level), unit = MW
//	expected_mw    float64 (field metadata unit = MW)
//	capacity_mw    float64 (field metadata unit = MW)
//	availability   float64 (0..1)
//
// The schema metadata holds, in this order: plumb.schema (the format
// version, BundleSchemaVersion), plumb.site, plumb.model, plumb.calibrator,
// plumb.watermark (RFC 3339 in UTC) and plumb.weather_issued_at (RFC 3339 in
// UTC, or empty when no weather run was used). Times are RFC 3339 with as
// many fractional digits as needed (time.RFC3339Nano).
//
// Any Arrow library reads it: the levels are in the field metadata, so a
// reader need not parse column names.
const (
	// BundleSchemaVersion is the value of MetaSchema this package writes
	// and the only one DecodeBundle reads.
	BundleSchemaVersion = "1"

	MetaSchema          = "plumb.schema"
	MetaSite            = "plumb.site"
	MetaModel           = "plumb.model"
	MetaCalibrator      = "plumb.calibrator"
	MetaWatermark       = "plumb.watermark"
	MetaWeatherIssuedAt = "plumb.weather_issued_at"
	// MetaLevel is the field metadata key holding a quantile column's level.
	MetaLevel = "plumb.level"
	// MetaUnit is the field metadata key holding a column's unit.
	MetaUnit = "unit"
)

// Column names of the quantile bundle, other than the per-level columns.
const (
	ColSite         = "site"
	ColIssuedAt     = "issued_at"
	ColValidStart   = "valid_start"
	ColValidMinutes = "valid_minutes"
	ColLeadMinutes  = "lead_minutes"
	ColExpected     = "expected_mw"
	ColCapacity     = "capacity_mw"
	ColAvailability = "availability"
)

// ErrBadBundle is wrapped by every error of DecodeBundle, and by the errors
// of BundleEncoder.Encode for a bundle that cannot be written (inconsistent
// lengths, bad levels...).
var ErrBadBundle = errors.New("bad quantile bundle")

// bundle column layout: fixed columns before the levels, and after them.
const (
	nLead  = 5
	nTrail = 3
)

var (
	timestampMS = &arrow.TimestampType{Unit: arrow.Millisecond, TimeZone: "UTC"}
	unitMW      = arrow.NewMetadata([]string{MetaUnit}, []string{"MW"})
)

// bundleFields returns the fields of a bundle with the given levels.
func bundleFields(levels []float64) []arrow.Field {
	fields := make([]arrow.Field, 0, nLead+len(levels)+nTrail)
	fields = append(fields,
		arrow.Field{Name: ColSite, Type: arrow.BinaryTypes.String},
		arrow.Field{Name: ColIssuedAt, Type: timestampMS},
		arrow.Field{Name: ColValidStart, Type: timestampMS},
		arrow.Field{Name: ColValidMinutes, Type: arrow.PrimitiveTypes.Int32},
		arrow.Field{Name: ColLeadMinutes, Type: arrow.PrimitiveTypes.Int32},
	)
	for _, l := range levels {
		fields = append(fields, arrow.Field{
			Name:     model.LevelColumn(l),
			Type:     arrow.PrimitiveTypes.Float64,
			Metadata: arrow.NewMetadata([]string{MetaLevel, MetaUnit}, []string{model.FormatLevel(l), "MW"}),
		})
	}
	return append(fields,
		arrow.Field{Name: ColExpected, Type: arrow.PrimitiveTypes.Float64, Metadata: unitMW},
		arrow.Field{Name: ColCapacity, Type: arrow.PrimitiveTypes.Float64, Metadata: unitMW},
		arrow.Field{Name: ColAvailability, Type: arrow.PrimitiveTypes.Float64},
	)
}

// bundleMetadata returns the schema metadata of b.
func bundleMetadata(b *model.Bundle) arrow.Metadata {
	return arrow.NewMetadata(
		[]string{MetaSchema, MetaSite, MetaModel, MetaCalibrator, MetaWatermark, MetaWeatherIssuedAt},
		[]string{BundleSchemaVersion, b.Site, b.Model, b.Calibrator, formatTime(b.Watermark), formatTime(b.WeatherIssuedAt)},
	)
}

// formatTime writes t in RFC 3339 in UTC, or "" for the zero time.
func formatTime(t time.Time) string {
	if t.IsZero() {
		return ""
	}
	return t.UTC().Format(time.RFC3339Nano)
}

// BundleSchema returns the Arrow schema of b's wire form: its fields follow
// b.Levels, its metadata b's site, model, calibrator, watermark and weather
// issue time. b's steps and values are not used.
func BundleSchema(b *model.Bundle) *arrow.Schema {
	md := bundleMetadata(b)
	return arrow.NewSchema(bundleFields(b.Levels), &md)
}

// BundleEncoder writes quantile bundles as Arrow IPC streams. It keeps its
// column buffers, and the fields of the last levels it saw, from one call to
// the next, so a long-lived encoder allocates little. The zero value is not
// usable: call NewBundleEncoder. A BundleEncoder is not safe for concurrent
// use; give each goroutine its own.
//
// # Fast path
//
// The Arrow IPC writer rebuilds the schema and record batch flatbuffers of
// every stream, a few hundred small allocations. Yet for a given set of
// levels the bytes of the schema message depend only on the lengths of the
// metadata values (a flatbuffer's layout follows the sizes of what it holds,
// never their content), and those of the record batch header only on the
// number of rows and the length of the site id. So the first bundle of each
// shape is written by the Arrow writer, and the encoder cuts from its bytes a
// template of each message: the schema message with the places of its five
// varying metadata values, the record batch header with the places of its
// buffers in the body. A later bundle of the same shape is written from the
// templates: the schema message copied with the metadata values put in place,
// the header copied, the column values written where the header says, then
// the end-of-stream marker. A template is used only if writing the very
// bundle it was cut from reproduces the Arrow writer's bytes exactly;
// otherwise that shape always goes through the Arrow writer. Either way the
// same bundle gives the same bytes (TestEncoderFastPathMatchesArrow checks
// the two paths against each other).
type BundleEncoder struct {
	mem memory.Allocator

	levels []float64     // the levels fields was built for
	fields []arrow.Field // cached fields of levels

	// Column scratch, reused: the arrays of a record are views on these.
	f64  []float64
	i32  []int32
	ts   []arrow.Timestamp
	offs []int32
	str  []byte
	cols []arrow.Array

	// Message templates of the fast path, by shape; cleared when the levels
	// change.
	schemas map[schemaShape]*schemaTemplate
	batches map[batchShape]*batchTemplate
	times   []byte   // scratch: watermark and weather issue time as text
	cols8   [][]byte // scratch: the quantile columns of a body
}

// schemaShape is what the bytes of a schema message depend on besides the
// levels: the lengths of the metadata values that vary from bundle to bundle.
type schemaShape struct {
	site, model, calibrator, watermark, weather int
}

// batchShape is what the bytes of a record batch header, and the layout of
// its body, depend on besides the levels.
type batchShape struct {
	rows, site int
}

// schemaTemplate is a framed schema message (continuation marker, length,
// flatbuffer, padding) and the positions in it of the metadata values site,
// model, calibrator, watermark and weather issue time.
type schemaTemplate struct {
	msg []byte
	at  [5]int
	ok  bool // writing from the template reproduced the Arrow writer's bytes
}

// batchTemplate is a framed record batch header and the places of the
// buffers in the body that follows it, in the order of the header.
type batchTemplate struct {
	head []byte
	bufs []bodySpan
	body int // body length
	ok   bool
}

type bodySpan struct{ off, len int }

// maxTemplates bounds each template map; past it the map starts afresh.
const maxTemplates = 64

// ipcEOS is the end-of-stream marker of the Arrow IPC stream format.
var ipcEOS = [8]byte{0xFF, 0xFF, 0xFF, 0xFF, 0, 0, 0, 0}

// NewBundleEncoder returns an encoder that allocates through Go's garbage
// collector.
func NewBundleEncoder() *BundleEncoder {
	return &BundleEncoder{
		mem:     memory.NewGoAllocator(),
		schemas: make(map[schemaShape]*schemaTemplate),
		batches: make(map[batchShape]*batchTemplate),
	}
}

// Encode appends to dst the Arrow IPC stream of b. The same bundle always
// gives the same bytes. Times are written with millisecond precision in the
// columns (finer parts are dropped) and exactly in the schema metadata.
// Once the encoder has seen a bundle of the same shape (levels, number of
// steps, lengths of the site id, model and calibrator names and times), it
// does not allocate beyond growing dst.
//
// b must be consistent: a valid site id, at least one level, levels
// strictly increasing inside (0, 1), len(b.Q) == len(b.Steps)*len(b.Levels),
// len(b.Expected) == len(b.Steps), minutes that fit in an int32. Otherwise
// Encode returns an error wrapping ErrBadBundle and leaves dst unchanged. It
// panics if b is nil.
func (e *BundleEncoder) Encode(dst *bytes.Buffer, b *model.Bundle) error {
	if b == nil {
		panic("stream: Encode of a nil bundle")
	}
	if err := checkBundle(b); err != nil {
		return fmt.Errorf("stream: encode bundle: %w", err)
	}
	if !slices.Equal(e.levels, b.Levels) {
		e.levels = append(e.levels[:0], b.Levels...)
		e.fields = bundleFields(e.levels)
		clear(e.schemas)
		clear(e.batches)
	}
	e.times = appendTime(e.times[:0], b.Watermark)
	nw := len(e.times)
	e.times = appendTime(e.times, b.WeatherIssuedAt)
	wm, wi := e.times[:nw], e.times[nw:]
	ss := schemaShape{len(b.Site), len(b.Model), len(b.Calibrator), len(wm), len(wi)}
	bs := batchShape{rows: len(b.Steps), site: len(b.Site)}
	st, bt := e.schemas[ss], e.batches[bs]
	if st != nil && bt != nil {
		if st.ok && bt.ok {
			e.writeFromTemplates(dst, b, st, bt, wm, wi)
			return nil
		}
		return e.encodeArrow(dst, b)
	}
	mark := dst.Len()
	if err := e.encodeArrow(dst, b); err != nil {
		return err
	}
	e.learnTemplates(dst.Bytes()[mark:], b, ss, bs, st, bt, wm, wi)
	return nil
}

// encodeArrow appends the stream of b made by the Arrow IPC writer.
func (e *BundleEncoder) encodeArrow(dst *bytes.Buffer, b *model.Bundle) error {
	md := bundleMetadata(b)
	schema := arrow.NewSchema(e.fields, &md)

	rec := e.record(schema, b)
	defer rec.Release()
	mark := dst.Len()
	w := ipc.NewWriter(dst, ipc.WithSchema(schema), ipc.WithAllocator(e.mem))
	err := w.Write(rec)
	if cerr := w.Close(); err == nil {
		err = cerr
	}
	if err != nil {
		dst.Truncate(mark)
		return fmt.Errorf("stream: encode bundle: %w", err)
	}
	return nil
}

// appendTime appends t in RFC 3339 in UTC, or nothing for the zero time
// (formatTime's text).
func appendTime(dst []byte, t time.Time) []byte {
	if t.IsZero() {
		return dst
	}
	return t.UTC().AppendFormat(dst, time.RFC3339Nano)
}

// learnTemplates cuts the missing templates of b's shapes from data, the
// stream of b the Arrow writer made, and keeps them; a template is marked
// usable only if writing b from the templates gives data again.
func (e *BundleEncoder) learnTemplates(data []byte, b *model.Bundle, ss schemaShape, bs batchShape, st *schemaTemplate, bt *batchTemplate, wm, wi []byte) {
	newST, newBT := st == nil, bt == nil
	var err error
	if newST {
		st, err = cutSchemaTemplate(data, [5]string{b.Site, b.Model, b.Calibrator, string(wm), string(wi)})
		if err != nil {
			st = &schemaTemplate{}
		}
		if len(e.schemas) >= maxTemplates {
			clear(e.schemas)
		}
		e.schemas[ss] = st
	}
	if newBT {
		bt, err = cutBatchTemplate(data, len(b.Levels), len(b.Steps), len(b.Site))
		if err != nil {
			bt = &batchTemplate{}
		}
		if len(e.batches) >= maxTemplates {
			clear(e.batches)
		}
		e.batches[bs] = bt
	}
	if st.msg == nil || bt.head == nil || (!newST && !st.ok) || (!newBT && !bt.ok) {
		return
	}
	// Self-check: the templates must give the Arrow writer's bytes.
	var again bytes.Buffer
	wasST, wasBT := st.ok, bt.ok
	st.ok, bt.ok = true, true
	e.writeFromTemplates(&again, b, st, bt, wm, wi)
	same := bytes.Equal(again.Bytes(), data)
	st.ok, bt.ok = wasST || (newST && same), wasBT || (newBT && same)
}

// cutSchemaTemplate takes the schema message, the first of the stream data,
// and finds in it the metadata values vals (site, model, calibrator,
// watermark, weather issue time), which follow the schema version.
func cutSchemaTemplate(data []byte, vals [5]string) (*schemaTemplate, error) {
	msg, fb, err := ipcMessage(data)
	if err != nil {
		return nil, err
	}
	m, err := fb.table(rootOf(fb))
	if err != nil {
		return nil, err
	}
	h, ok, err := m.sub(2) // header: the Schema table
	if err != nil || !ok {
		return nil, errors.Join(err, errors.New("no schema header"))
	}
	var at []int
	if _, err := h.tables(2, func(kv fbTable) error { // custom_metadata
		start, n, err := kv.vector(1, 1) // value
		if err != nil {
			return err
		}
		at = append(at, 8+start, n)
		return nil
	}); err != nil {
		return nil, err
	}
	if len(at) != 2*6 {
		return nil, fmt.Errorf("%d schema metadata values, want 6", len(at)/2)
	}
	t := &schemaTemplate{msg: slices.Clone(msg)}
	for k, v := range vals {
		p, n := at[2*(k+1)], at[2*(k+1)+1]
		if n != len(v) || string(msg[p:p+n]) != v {
			return nil, errors.New("schema metadata value not where expected")
		}
		t.at[k] = p
	}
	return t, nil
}

// cutBatchTemplate takes the record batch message, the second of the
// stream data, and checks that its body has the buffers a bundle of nl
// levels, rows rows and a site id of siteLen bytes fills.
func cutBatchTemplate(data []byte, nl, rows, siteLen int) (*batchTemplate, error) {
	schema, _, err := ipcMessage(data)
	if err != nil {
		return nil, err
	}
	p := len(schema)
	head, fb, err := ipcMessage(data[p:])
	if err != nil {
		return nil, err
	}
	m, err := fb.table(rootOf(fb))
	if err != nil {
		return nil, err
	}
	body, err := m.i64(3)
	if err != nil {
		return nil, err
	}
	h, ok, err := m.sub(2) // header: the RecordBatch table
	if err != nil || !ok {
		return nil, errors.Join(err, errors.New("no record batch header"))
	}
	start, n, err := h.vector(2, 16) // buffers: offset, length
	if err != nil {
		return nil, err
	}
	want := bodyLens(nl, rows, siteLen)
	if n != len(want) || body < 0 || int64(p+len(head))+body+int64(len(ipcEOS)) != int64(len(data)) {
		return nil, errors.New("unexpected record batch layout")
	}
	t := &batchTemplate{head: slices.Clone(head), bufs: make([]bodySpan, n), body: int(body)}
	end := 0
	for k := range n {
		off, _ := fb.i64(start + 16*k)
		l, _ := fb.i64(start + 16*k + 8)
		if l != int64(want[k]) || off < int64(end) || off+l > body {
			return nil, errors.New("unexpected record batch buffer")
		}
		t.bufs[k] = bodySpan{off: int(off), len: int(l)}
		end = int(off + l)
	}
	return t, nil
}

// bodyLens returns the lengths of the body buffers of a bundle, in the
// order of the Arrow format: per column its validity bitmap (empty: no
// nulls), then its offsets and values (site) or its values.
func bodyLens(nl, rows, siteLen int) []int {
	lens := []int{0, 4 * (rows + 1), rows * siteLen} // site
	for range 2 {                                    // issued_at, valid_start
		lens = append(lens, 0, 8*rows)
	}
	for range 2 { // valid_minutes, lead_minutes
		lens = append(lens, 0, 4*rows)
	}
	for range nl + nTrail {
		lens = append(lens, 0, 8*rows)
	}
	return lens
}

// ipcMessage returns the framed metadata of the message at the start of
// data (continuation marker, length, flatbuffer and padding) and its
// flatbuffer.
func ipcMessage(data []byte) (framed []byte, fb fbuf, err error) {
	if len(data) < 8 || binary.LittleEndian.Uint32(data) != 0xFFFFFFFF {
		return nil, nil, errors.New("no IPC message")
	}
	n := int(int32(binary.LittleEndian.Uint32(data[4:])))
	if n <= 0 || n > len(data)-8 {
		return nil, nil, errors.New("bad IPC message length")
	}
	return data[:8+n], fbuf(data[8 : 8+n]), nil
}

// rootOf returns the position of a flatbuffer's root table (-1 if none).
func rootOf(fb fbuf) int {
	r, err := fb.u32(0)
	if err != nil {
		return -1
	}
	return r
}

// writeFromTemplates appends b's stream, made from its shapes' templates.
func (e *BundleEncoder) writeFromTemplates(dst *bytes.Buffer, b *model.Bundle, st *schemaTemplate, bt *batchTemplate, wm, wi []byte) {
	total := len(st.msg) + len(bt.head) + bt.body + len(ipcEOS)
	dst.Grow(total)
	out := dst.AvailableBuffer()[:total]
	p := copy(out, st.msg)
	copy(out[st.at[0]:], b.Site)
	copy(out[st.at[1]:], b.Model)
	copy(out[st.at[2]:], b.Calibrator)
	copy(out[st.at[3]:], wm)
	copy(out[st.at[4]:], wi)
	p += copy(out[p:], bt.head)
	e.cols8 = fillBody(out[p:p+bt.body], bt.bufs, b, e.cols8)
	copy(out[p+bt.body:], ipcEOS[:])
	dst.Write(out)
}

// fillBody writes b's columns into body at the places spans gives (the
// order of bodyLens), and zeroes the padding between them; cols is scratch,
// returned for reuse.
func fillBody(body []byte, spans []bodySpan, b *model.Bundle, cols [][]byte) [][]byte {
	n, nl := len(b.Steps), len(b.Levels)
	le := binary.LittleEndian
	region := func(k int) []byte {
		s := spans[k]
		next := len(body)
		if k+1 < len(spans) {
			next = spans[k+1].off
		}
		clear(body[s.off+s.len : next])
		return body[s.off : s.off+s.len]
	}
	// The validity bitmaps are empty; only their padding (none) is cleared.
	region(0)
	if offs := region(1); len(offs) > 0 {
		for i := range n + 1 {
			le.PutUint32(offs[4*i:], uint32(i*len(b.Site)))
		}
	}
	str := region(2)
	for i := range n {
		copy(str[i*len(b.Site):], b.Site)
	}
	region(3)
	issued, iss := region(4), uint64(b.IssuedAt.UnixMilli())
	for i := range n {
		le.PutUint64(issued[8*i:], iss)
	}
	region(5)
	starts := region(6)
	for i, s := range b.Steps {
		le.PutUint64(starts[8*i:], uint64(s.ValidStart.UnixMilli()))
	}
	region(7)
	valid := region(8)
	region(9)
	lead := region(10)
	for i, s := range b.Steps {
		le.PutUint32(valid[4*i:], uint32(int32(s.ValidMinutes)))
		le.PutUint32(lead[4*i:], uint32(int32(s.LeadMinutes)))
	}
	k := 11
	// The quantile columns: Q transposed, read row after row.
	cols = cols[:0]
	for range nl {
		region(k)
		cols = append(cols, region(k + 1)[:8*n])
		k += 2
	}
	for i := range n {
		row := b.Q[i*nl : (i+1)*nl]
		for j, v := range row {
			le.PutUint64(cols[j][8*i:], math.Float64bits(v))
		}
	}
	region(k)
	expected := region(k + 1)[:8*n]
	for i, v := range b.Expected {
		le.PutUint64(expected[8*i:], math.Float64bits(v))
	}
	for _, v := range [...]float64{b.CapacityMW, b.Availability} {
		k += 2
		region(k)
		col := region(k + 1)[:8*n]
		for i := range n {
			le.PutUint64(col[8*i:], math.Float64bits(v))
		}
	}
	return cols
}

// record lays b out in the encoder's scratch buffers and returns a record
// whose arrays are views on them (valid until the next call).
func (e *BundleEncoder) record(schema *arrow.Schema, b *model.Bundle) arrow.RecordBatch {
	n, nl := len(b.Steps), len(b.Levels)

	// Site: the same string in every row.
	e.offs = slices.Grow(e.offs[:0], n+1)[:n+1]
	e.str = slices.Grow(e.str[:0], n*len(b.Site))[:0]
	for i := range n {
		e.offs[i] = int32(i * len(b.Site))
		e.str = append(e.str, b.Site...)
	}
	e.offs[n] = int32(n * len(b.Site))

	// Timestamps: issued_at then valid_start.
	e.ts = slices.Grow(e.ts[:0], 2*n)[:2*n]
	issued := arrow.Timestamp(b.IssuedAt.UnixMilli())
	for i, s := range b.Steps {
		e.ts[i] = issued
		e.ts[n+i] = arrow.Timestamp(s.ValidStart.UnixMilli())
	}
	// Minutes: valid then lead.
	e.i32 = slices.Grow(e.i32[:0], 2*n)[:2*n]
	for i, s := range b.Steps {
		e.i32[i] = int32(s.ValidMinutes)
		e.i32[n+i] = int32(s.LeadMinutes)
	}
	// Floats, column after column: the levels (Q transposed), expected,
	// capacity, availability.
	e.f64 = slices.Grow(e.f64[:0], (nl+nTrail)*n)[:(nl+nTrail)*n]
	for j := range nl {
		col := e.f64[j*n : (j+1)*n]
		for i := range col {
			col[i] = b.Q[i*nl+j]
		}
	}
	copy(e.f64[nl*n:], b.Expected)
	for i := range n {
		e.f64[(nl+1)*n+i] = b.CapacityMW
		e.f64[(nl+2)*n+i] = b.Availability
	}

	e.cols = append(e.cols[:0],
		view(arrow.BinaryTypes.String, n, arrow.Int32Traits.CastToBytes(e.offs), e.str),
		view(timestampMS, n, arrow.TimestampTraits.CastToBytes(e.ts[:n])),
		view(timestampMS, n, arrow.TimestampTraits.CastToBytes(e.ts[n:])),
		view(arrow.PrimitiveTypes.Int32, n, arrow.Int32Traits.CastToBytes(e.i32[:n])),
		view(arrow.PrimitiveTypes.Int32, n, arrow.Int32Traits.CastToBytes(e.i32[n:])),
	)
	for j := range nl + nTrail {
		e.cols = append(e.cols, view(arrow.PrimitiveTypes.Float64, n, arrow.Float64Traits.CastToBytes(e.f64[j*n:(j+1)*n])))
	}
	rec := array.NewRecordBatch(schema, e.cols, int64(n))
	for i, c := range e.cols {
		c.Release() // the record holds them now
		e.cols[i] = nil
	}
	return rec
}

// view returns a non-null array of n values of type dt over the given
// buffers (no validity bitmap), without copying them.
func view(dt arrow.DataType, n int, bufs ...[]byte) arrow.Array {
	mb := make([]*memory.Buffer, 1+len(bufs))
	for i, b := range bufs {
		mb[i+1] = memory.NewBufferBytes(b)
	}
	data := array.NewData(dt, n, mb, nil, 0, 0)
	defer data.Release()
	return array.MakeFromData(data)
}

// checkBundle checks what Encode needs of b.
func checkBundle(b *model.Bundle) error {
	if !model.ValidID(b.Site) {
		return fmt.Errorf("%w: site %s is not a valid site id", ErrBadBundle, quote(b.Site))
	}
	if len(b.Levels) == 0 {
		return fmt.Errorf("%w: no level", ErrBadBundle)
	}
	for j, l := range b.Levels {
		if !(l > 0 && l < 1) {
			return fmt.Errorf("%w: level %v outside (0, 1)", ErrBadBundle, l)
		}
		if j > 0 && !(l > b.Levels[j-1]) {
			return fmt.Errorf("%w: levels not strictly increasing at %v", ErrBadBundle, l)
		}
	}
	n := len(b.Steps)
	if len(b.Q) != n*len(b.Levels) {
		return fmt.Errorf("%w: %d quantiles for %d steps and %d levels", ErrBadBundle, len(b.Q), n, len(b.Levels))
	}
	if len(b.Expected) != n {
		return fmt.Errorf("%w: %d expected values for %d steps", ErrBadBundle, len(b.Expected), n)
	}
	if (n+1)*len(b.Site) > math.MaxInt32 {
		return fmt.Errorf("%w: %d steps are too many", ErrBadBundle, n)
	}
	for _, s := range b.Steps {
		if s.ValidMinutes != int(int32(s.ValidMinutes)) || s.LeadMinutes != int(int32(s.LeadMinutes)) {
			return fmt.Errorf("%w: step at %s: minutes out of the int32 range", ErrBadBundle, s.ValidStart.Format(time.RFC3339))
		}
	}
	return nil
}

// DecodeBundle reads one quantile bundle written by BundleEncoder (or by
// any Arrow writer following the same schema). It checks the schema version
// and the layout, reads the levels from the field metadata, and returns
// times in UTC. Issue time, capacity and availability are columns that must
// be constant; a bundle without steps, having no row to hold them, decodes
// with them zero. Every error wraps ErrBadBundle.
func DecodeBundle(data []byte) (b *model.Bundle, err error) {
	defer func() {
		if r := recover(); r != nil {
			err = fmt.Errorf("%w: arrow reader: %v", ErrBadBundle, r)
		}
		if err != nil {
			b, err = nil, fmt.Errorf("stream: decode bundle: %w", err)
		}
	}()
	if err := checkStream(data); err != nil {
		return nil, err
	}
	// Nothing in the stream can be longer than the stream: bound what the
	// reader allocates on the word of a length field.
	limit := max(int64(len(data)), 1)
	rdr, err := ipc.NewReader(bytes.NewReader(data), ipc.WithMetadataSizeLimit(limit), ipc.WithBodySizeLimit(limit))
	if err != nil {
		return nil, fmt.Errorf("%w: %w", ErrBadBundle, err)
	}
	defer rdr.Release()

	schema := rdr.Schema()
	b, err = bundleFromSchema(schema)
	if err != nil {
		return nil, err
	}
	if !rdr.Next() {
		if rerr := rdr.Err(); rerr != nil {
			return nil, fmt.Errorf("%w: %w", ErrBadBundle, rerr)
		}
		return nil, fmt.Errorf("%w: no record batch", ErrBadBundle)
	}
	if err := fillBundle(b, rdr.RecordBatch()); err != nil {
		return nil, err
	}
	if rdr.Next() {
		return nil, fmt.Errorf("%w: more than one record batch", ErrBadBundle)
	}
	if rerr := rdr.Err(); rerr != nil {
		return nil, fmt.Errorf("%w: %w", ErrBadBundle, rerr)
	}
	return b, nil
}

// bundleFromSchema checks the schema and returns a bundle holding its
// metadata and levels.
func bundleFromSchema(s *arrow.Schema) (*model.Bundle, error) {
	md := s.Metadata()
	version, ok := md.GetValue(MetaSchema)
	if !ok {
		return nil, fmt.Errorf("%w: no %s schema metadata (not a quantile bundle)", ErrBadBundle, MetaSchema)
	}
	if version != BundleSchemaVersion {
		return nil, fmt.Errorf("%w: schema version %s, this reader knows %s", ErrBadBundle, quote(version), BundleSchemaVersion)
	}
	b := &model.Bundle{}
	b.Site, _ = md.GetValue(MetaSite)
	b.Model, _ = md.GetValue(MetaModel)
	b.Calibrator, _ = md.GetValue(MetaCalibrator)
	var err error
	if b.Watermark, err = parseMetaTime(md, MetaWatermark); err != nil {
		return nil, err
	}
	if b.WeatherIssuedAt, err = parseMetaTime(md, MetaWeatherIssuedAt); err != nil {
		return nil, err
	}

	fields := s.Fields()
	nl := len(fields) - nLead - nTrail
	if nl < 1 {
		return nil, fmt.Errorf("%w: %d columns, want at least %d", ErrBadBundle, len(fields), nLead+nTrail+1)
	}
	want := func(i int, name string, dt arrow.DataType) error {
		f := fields[i]
		if f.Name != name || !arrow.TypeEqual(f.Type, dt) {
			return fmt.Errorf("%w: column %d is %s %s, want %s %s", ErrBadBundle, i, quote(f.Name), f.Type, name, dt)
		}
		return nil
	}
	for _, c := range []struct {
		i    int
		name string
		dt   arrow.DataType
	}{
		{0, ColSite, arrow.BinaryTypes.String},
		{1, ColIssuedAt, timestampMS},
		{2, ColValidStart, timestampMS},
		{3, ColValidMinutes, arrow.PrimitiveTypes.Int32},
		{4, ColLeadMinutes, arrow.PrimitiveTypes.Int32},
		{nLead + nl, ColExpected, arrow.PrimitiveTypes.Float64},
		{nLead + nl + 1, ColCapacity, arrow.PrimitiveTypes.Float64},
		{nLead + nl + 2, ColAvailability, arrow.PrimitiveTypes.Float64},
	} {
		if err := want(c.i, c.name, c.dt); err != nil {
			return nil, err
		}
	}
	b.Levels = make([]float64, nl)
	for j := range nl {
		f := fields[nLead+j]
		text, ok := f.Metadata.GetValue(MetaLevel)
		if !ok {
			return nil, fmt.Errorf("%w: column %s has no %s metadata", ErrBadBundle, quote(f.Name), MetaLevel)
		}
		l, err := strconv.ParseFloat(text, 64)
		if err != nil || !(l > 0 && l < 1) {
			return nil, fmt.Errorf("%w: column %s: level %s is not a number in (0, 1)", ErrBadBundle, quote(f.Name), quote(text))
		}
		if j > 0 && !(l > b.Levels[j-1]) {
			return nil, fmt.Errorf("%w: levels not strictly increasing at column %s", ErrBadBundle, quote(f.Name))
		}
		if f.Name != model.LevelColumn(l) || !arrow.TypeEqual(f.Type, arrow.PrimitiveTypes.Float64) {
			return nil, fmt.Errorf("%w: column %d is %s %s, want %s float64", ErrBadBundle, nLead+j, quote(f.Name), f.Type, model.LevelColumn(l))
		}
		b.Levels[j] = l
	}
	return b, nil
}

func parseMetaTime(md arrow.Metadata, key string) (time.Time, error) {
	v, ok := md.GetValue(key)
	if !ok {
		return time.Time{}, fmt.Errorf("%w: no %s schema metadata", ErrBadBundle, key)
	}
	if v == "" {
		return time.Time{}, nil
	}
	t, err := time.Parse(time.RFC3339Nano, v)
	if err != nil {
		return time.Time{}, fmt.Errorf("%w: %s %s is not an RFC 3339 time", ErrBadBundle, key, quote(v))
	}
	return t.UTC(), nil
}

// fillBundle copies the record's rows into b (whose levels are set).
func fillBundle(b *model.Bundle, rec arrow.RecordBatch) error {
	for i, c := range rec.Columns() {
		if c.NullN() != 0 {
			return fmt.Errorf("%w: column %s holds nulls", ErrBadBundle, quote(rec.ColumnName(i)))
		}
	}
	n, nl := int(rec.NumRows()), len(b.Levels)
	sites := rec.Column(0).(*array.String)
	issued := rec.Column(1).(*array.Timestamp).TimestampValues()
	starts := rec.Column(2).(*array.Timestamp).TimestampValues()
	valid := rec.Column(3).(*array.Int32).Int32Values()
	lead := rec.Column(4).(*array.Int32).Int32Values()
	floats := func(j int) []float64 { return rec.Column(j).(*array.Float64).Float64Values() }
	// The columns' lengths and their value buffers must agree with the row
	// count (a damaged stream can say otherwise).
	lens := []int{sites.Len(), len(issued), len(starts), len(valid), len(lead)}
	for j := nLead; j < nLead+nl+nTrail; j++ {
		lens = append(lens, len(floats(j)))
	}
	for j, l := range lens {
		if l != n {
			return fmt.Errorf("%w: column %s holds %d values for %d rows", ErrBadBundle, quote(rec.ColumnName(j)), l, n)
		}
	}

	b.Steps = make([]model.Step, n)
	b.Q = make([]float64, n*nl)
	b.Expected = append(make([]float64, 0, n), floats(nLead+nl)...)
	for i := range n {
		if sites.Value(i) != b.Site {
			return fmt.Errorf("%w: row %d: site %s, schema metadata says %s", ErrBadBundle, i+1, quote(sites.Value(i)), quote(b.Site))
		}
		if i == 0 {
			b.IssuedAt = time.UnixMilli(int64(issued[0])).UTC()
		} else if issued[i] != issued[0] {
			return fmt.Errorf("%w: row %d: issued_at differs from row 1", ErrBadBundle, i+1)
		}
		b.Steps[i] = model.Step{
			ValidStart:   time.UnixMilli(int64(starts[i])).UTC(),
			ValidMinutes: int(valid[i]),
			LeadMinutes:  int(lead[i]),
		}
	}
	for j := range nl {
		for i, v := range floats(nLead + j) {
			b.Q[i*nl+j] = v
		}
	}
	for k, dst := range []*float64{&b.CapacityMW, &b.Availability} {
		col := floats(nLead + nl + 1 + k)
		for i, v := range col {
			if i == 0 {
				*dst = v
			} else if v != col[0] && !(math.IsNaN(v) && math.IsNaN(col[0])) {
				return fmt.Errorf("%w: row %d: %s differs from row 1", ErrBadBundle, i+1, rec.ColumnName(nLead+nl+1+k))
			}
		}
	}
	return nil
}

// The Arrow IPC reader trusts the lengths inside the flatbuffer metadata of
// a stream: a corrupted or hostile stream can make it allocate without bound
// or recurse forever, which no recover catches. checkStream walks the
// framing and the metadata first and refuses whatever a BundleEncoder would
// not write (other message kinds, nested or dictionary-encoded fields,
// compression) and any offset or length that points outside its buffer.
// Smaller faults that the Arrow code reports by panicking are recovered by
// DecodeBundle.

// Flatbuffer enum values of the Arrow format (format/Message.fbs, Schema.fbs).
const (
	fbHeaderSchema      = 1
	fbHeaderRecordBatch = 3
	fbTypeInt           = 2
	fbTypeFloatingPoint = 3
	fbTypeUtf8          = 5
	fbTypeTimestamp     = 10
)

// checkStream checks the framing of an IPC stream and the metadata of each
// of its messages.
func checkStream(data []byte) error {
	if len(data) == 0 {
		return fmt.Errorf("%w: empty stream", ErrBadBundle)
	}
	p := 0
	for msg := 0; p < len(data); msg++ {
		if len(data)-p < 8 || binary.LittleEndian.Uint32(data[p:]) != 0xFFFFFFFF {
			return fmt.Errorf("%w: no IPC message at byte %d", ErrBadBundle, p)
		}
		metaLen := int64(int32(binary.LittleEndian.Uint32(data[p+4:])))
		p += 8
		if metaLen == 0 { // end of stream
			return nil
		}
		if metaLen < 0 || metaLen > int64(len(data)-p) {
			return fmt.Errorf("%w: message %d: metadata length %d out of bounds", ErrBadBundle, msg, metaLen)
		}
		body, err := checkMessage(fbuf(data[p:p+int(metaLen)]), msg)
		if err != nil {
			return fmt.Errorf("%w: message %d: %w", ErrBadBundle, msg, err)
		}
		p += int(metaLen)
		if body < 0 || body > int64(len(data)-p) {
			return fmt.Errorf("%w: message %d: body length %d out of bounds", ErrBadBundle, msg, body)
		}
		p += int(body)
	}
	return nil
}

var errFB = errors.New("flatbuffer offset out of bounds")

// fbuf is one flatbuffer; its methods check every read against its length.
type fbuf []byte

func (b fbuf) u32(p int) (int, error) {
	if p < 0 || p > len(b)-4 {
		return 0, errFB
	}
	return int(binary.LittleEndian.Uint32(b[p:])), nil
}

func (b fbuf) i64(p int) (int64, error) {
	if p < 0 || p > len(b)-8 {
		return 0, errFB
	}
	return int64(binary.LittleEndian.Uint64(b[p:])), nil
}

// fbTable is a table of a flatbuffer: its position and its vtable's.
type fbTable struct {
	b         fbuf
	pos, vt   int
	vtEntries int
}

func (b fbuf) table(p int) (fbTable, error) {
	so, err := b.u32(p)
	if err != nil {
		return fbTable{}, err
	}
	vt := p - int(int32(uint32(so)))
	if vt < 0 || vt > len(b)-4 {
		return fbTable{}, errFB
	}
	vtLen := int(binary.LittleEndian.Uint16(b[vt:]))
	if vtLen < 4 || vtLen%2 != 0 || vt+vtLen > len(b) {
		return fbTable{}, errFB
	}
	return fbTable{b: b, pos: p, vt: vt, vtEntries: (vtLen - 4) / 2}, nil
}

// field returns the position of field slot i, or -1 when it is absent.
func (t fbTable) field(i int) int {
	if i >= t.vtEntries {
		return -1
	}
	off := int(binary.LittleEndian.Uint16(t.b[t.vt+4+2*i:]))
	if off == 0 {
		return -1
	}
	return t.pos + off
}

// u8 returns the byte of field slot i, or 0 when absent.
func (t fbTable) u8(i int) (int, error) {
	f := t.field(i)
	if f < 0 {
		return 0, nil
	}
	if f >= len(t.b) {
		return 0, errFB
	}
	return int(t.b[f]), nil
}

// i64 returns the int64 of field slot i, or 0 when absent.
func (t fbTable) i64(i int) (int64, error) {
	f := t.field(i)
	if f < 0 {
		return 0, nil
	}
	return t.b.i64(f)
}

// ref follows the offset in field slot i; -1 when absent.
func (t fbTable) ref(i int) (int, error) {
	f := t.field(i)
	if f < 0 {
		return -1, nil
	}
	u, err := t.b.u32(f)
	if err != nil {
		return 0, err
	}
	if f+u >= len(t.b) {
		return 0, errFB
	}
	return f + u, nil
}

// sub returns the table referenced by field slot i; ok false when absent.
func (t fbTable) sub(i int) (fbTable, bool, error) {
	p, err := t.ref(i)
	if err != nil || p < 0 {
		return fbTable{}, false, err
	}
	s, err := t.b.table(p)
	return s, err == nil, err
}

// vector returns the position of the first element and the length of the
// vector in field slot i (0, 0 when absent), checked to fit the buffer.
func (t fbTable) vector(i, elem int) (start, n int, err error) {
	p, err := t.ref(i)
	if err != nil || p < 0 {
		return 0, 0, err
	}
	if n, err = t.b.u32(p); err != nil {
		return 0, 0, err
	}
	if n > (len(t.b)-p-4)/elem {
		return 0, 0, errFB
	}
	return p + 4, n, nil
}

// tables checks a vector of tables in field slot i and calls fn on each.
func (t fbTable) tables(i int, fn func(fbTable) error) (int, error) {
	start, n, err := t.vector(i, 4)
	if err != nil {
		return 0, err
	}
	for k := range n {
		u, _ := t.b.u32(start + 4*k)
		s, err := t.b.table(start + 4*k + u)
		if err != nil {
			return 0, err
		}
		if fn != nil {
			if err := fn(s); err != nil {
				return 0, err
			}
		}
	}
	return n, nil
}

// checkKeyValues checks a vector of key-value metadata in field slot i.
func (t fbTable) checkKeyValues(i int) error {
	_, err := t.tables(i, func(kv fbTable) error {
		if _, _, err := kv.vector(0, 1); err != nil {
			return err
		}
		_, _, err := kv.vector(1, 1)
		return err
	})
	return err
}

// checkMessage checks one message's metadata (message msg of the stream)
// and returns its body length.
func checkMessage(b fbuf, msg int) (int64, error) {
	root, err := b.u32(0)
	if err != nil {
		return 0, err
	}
	m, err := b.table(root)
	if err != nil {
		return 0, err
	}
	if err := m.checkKeyValues(4); err != nil {
		return 0, err
	}
	body, err := m.i64(3)
	if err != nil {
		return 0, err
	}
	kind, err := m.u8(1)
	if err != nil {
		return 0, err
	}
	h, ok, err := m.sub(2)
	if err != nil {
		return 0, err
	}
	if !ok {
		return 0, errors.New("message without header")
	}
	switch {
	case kind == fbHeaderSchema && msg == 0:
		return body, checkSchemaFB(h)
	case kind == fbHeaderRecordBatch && msg > 0:
		return body, checkRecordBatchFB(h, body)
	}
	return 0, fmt.Errorf("unexpected message type %d", kind)
}

func checkSchemaFB(s fbTable) error {
	if err := s.checkKeyValues(2); err != nil {
		return err
	}
	if _, _, err := s.vector(3, 8); err != nil { // features
		return err
	}
	_, err := s.tables(1, func(f fbTable) error {
		if _, _, err := f.vector(0, 1); err != nil { // name
			return err
		}
		tt, err := f.u8(2)
		if err != nil {
			return err
		}
		if tt != fbTypeInt && tt != fbTypeFloatingPoint && tt != fbTypeUtf8 && tt != fbTypeTimestamp {
			return fmt.Errorf("field of unexpected type %d", tt)
		}
		typ, ok, err := f.sub(3)
		if err != nil {
			return err
		}
		if !ok {
			return errors.New("field without type")
		}
		if tt == fbTypeTimestamp {
			if _, _, err := typ.vector(1, 1); err != nil { // the time zone
				return err
			}
		}
		if f.field(4) >= 0 {
			return errors.New("dictionary-encoded field")
		}
		if _, n, err := f.vector(5, 4); err != nil || n != 0 {
			return errors.Join(err, errors.New("nested field"))
		}
		return f.checkKeyValues(6)
	})
	return err
}

func checkRecordBatchFB(r fbTable, body int64) error {
	// Every row takes at least one byte of the body: bounding counts by the
	// body's size bounds what the reader and DecodeBundle allocate.
	if n, err := r.i64(0); err != nil || n < 0 || n > body {
		return errors.Join(err, errors.New("row count out of bounds"))
	}
	start, n, err := r.vector(1, 16) // nodes: length, null count
	if err != nil {
		return err
	}
	for k := range n {
		length, _ := r.b.i64(start + 16*k)
		nulls, _ := r.b.i64(start + 16*k + 8)
		if length < 0 || length > body || nulls < 0 || nulls > length {
			return errors.New("bad field node")
		}
	}
	start, n, err = r.vector(2, 16) // buffers: offset, length
	if err != nil {
		return err
	}
	for k := range n {
		off, _ := r.b.i64(start + 16*k)
		length, _ := r.b.i64(start + 16*k + 8)
		if off < 0 || length < 0 || off > body || length > body-off {
			return errors.New("buffer outside the message body")
		}
	}
	if r.field(3) >= 0 {
		return errors.New("compressed record batch")
	}
	_, _, err = r.vector(4, 8)
	return err
}
