package stream

import (
	"bytes"
	"errors"
	"flag"
	"fmt"
	"math"
	"os"
	"path/filepath"
	"reflect"
	"strings"
	"testing"
	"time"

	"github.com/apache/arrow-go/v18/arrow"
	"github.com/apache/arrow-go/v18/arrow/array"
	"github.com/apache/arrow-go/v18/arrow/ipc"
	"github.com/apache/arrow-go/v18/arrow/memory"

	"github.com/plumb-forecast/plumb/model"
)

var update = flag.Bool("update", false, "rewrite the golden files in testdata/golden")

// checkGolden compares got with the golden file testdata/golden/name at the
// repository root, or rewrites the file when -update is set.
func checkGolden(t *testing.T, name string, got []byte) {
	t.Helper()
	path := filepath.Join("..", "testdata", "golden", name)
	if *update {
		if err := os.MkdirAll(filepath.Dir(path), 0o755); err != nil {
			t.Fatal(err)
		}
		if err := os.WriteFile(path, got, 0o644); err != nil {
			t.Fatal(err)
		}
		return
	}
	want, err := os.ReadFile(path)
	if err != nil {
		t.Fatalf("%v (run go test ./stream -run Golden -update to create it)", err)
	}
	if !bytes.Equal(got, want) {
		t.Errorf("%s differs from the golden file (run with -update if the change is intended):\n--- got\n%s\n--- want\n%s", name, got, want)
	}
}

// testBundle builds an invented bundle of pv-a: steps of 15 minutes from
// the issue time, quantiles increasing with the level.
func testBundle(steps int, levels []float64) *model.Bundle {
	issued := time.Date(2026, 3, 1, 10, 15, 0, 0, time.UTC)
	b := &model.Bundle{
		Site:            "pv-a",
		IssuedAt:        issued,
		Watermark:       issued,
		Model:           "baseline",
		Calibrator:      "aci",
		WeatherIssuedAt: time.Date(2026, 3, 1, 6, 0, 0, 0, time.UTC),
		CapacityMW:      5,
		Availability:    0.9,
		Levels:          levels,
		Steps:           make([]model.Step, steps),
		Q:               make([]float64, steps*len(levels)),
		Expected:        make([]float64, steps),
	}
	for i := range b.Steps {
		b.Steps[i] = model.Step{ValidStart: issued.Add(time.Duration(i) * 15 * time.Minute), ValidMinutes: 15, LeadMinutes: 15 * i}
		mid := 2 + 1.5*math.Sin(float64(i)/12)
		sum := 0.0
		for j, l := range levels {
			q := math.Max(0, math.Min(4.5, mid+2*(l-0.5)))
			b.Q[i*len(levels)+j] = q
			sum += q
		}
		b.Expected[i] = sum / float64(len(levels))
	}
	return b
}

func encode(t testing.TB, e *BundleEncoder, b *model.Bundle) []byte {
	t.Helper()
	var buf bytes.Buffer
	if err := e.Encode(&buf, b); err != nil {
		t.Fatalf("Encode: %v", err)
	}
	return buf.Bytes()
}

func TestBundleRoundTrip(t *testing.T) {
	odd := testBundle(3, []float64{0.025, 0.5, 0.975})
	odd.Site = "wind_B-2"
	odd.WeatherIssuedAt = time.Time{}                                      // no weather run
	odd.Watermark = time.Date(2026, 3, 1, 10, 14, 59, 123456789, time.UTC) // kept exactly in the metadata
	odd.Model, odd.Calibrator = "", "none"
	odd.Steps[2].ValidMinutes, odd.Steps[2].LeadMinutes = 60, -15
	odd.Q[0] = -0.0
	cases := []struct {
		name string
		b    *model.Bundle
	}{
		{"144 steps x 19 levels", testBundle(144, model.DefaultLevels())},
		{"one step, one level", testBundle(1, []float64{0.5})},
		{"99 levels", testBundle(8, model.LevelGrid(100))},
		{"no weather run, fractional watermark, odd steps", odd},
	}
	enc := NewBundleEncoder()
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			data := encode(t, enc, tc.b)
			got, err := DecodeBundle(data)
			if err != nil {
				t.Fatalf("DecodeBundle: %v", err)
			}
			if !reflect.DeepEqual(got, tc.b) {
				t.Errorf("round trip differs:\ngot  %+v\nwant %+v", got, tc.b)
			}
			for _, tm := range []time.Time{got.IssuedAt, got.Watermark, got.Steps[0].ValidStart} {
				if tm.Location() != time.UTC {
					t.Errorf("time %v not in UTC", tm)
				}
			}
		})
	}
}

func TestBundleRoundTripNoSteps(t *testing.T) {
	b := testBundle(0, []float64{0.1, 0.9})
	got, err := DecodeBundle(encode(t, NewBundleEncoder(), b))
	if err != nil {
		t.Fatalf("DecodeBundle: %v", err)
	}
	// Issue time, capacity and availability live in the rows: documented loss.
	if len(got.Steps) != 0 || len(got.Q) != 0 || !reflect.DeepEqual(got.Levels, b.Levels) ||
		got.Site != b.Site || !got.Watermark.Equal(b.Watermark) || !got.IssuedAt.IsZero() || got.CapacityMW != 0 {
		t.Errorf("empty bundle decoded as %+v", got)
	}
}

func TestBundleNonUTCInput(t *testing.T) {
	// Times given in another zone come back as the same instants in UTC.
	b := testBundle(4, []float64{0.5})
	zone := time.FixedZone("east", 3*3600)
	b.IssuedAt = b.IssuedAt.In(zone)
	b.Watermark = b.Watermark.In(zone)
	b.Steps[1].ValidStart = b.Steps[1].ValidStart.In(zone)
	got, err := DecodeBundle(encode(t, NewBundleEncoder(), b))
	if err != nil {
		t.Fatal(err)
	}
	if !got.IssuedAt.Equal(b.IssuedAt) || got.IssuedAt.Location() != time.UTC ||
		!got.Watermark.Equal(b.Watermark) || !got.Steps[1].ValidStart.Equal(b.Steps[1].ValidStart) {
		t.Errorf("times changed: %v %v %v", got.IssuedAt, got.Watermark, got.Steps[1].ValidStart)
	}
}

func TestBundleDeterministic(t *testing.T) {
	a := testBundle(144, model.DefaultLevels())
	other := testBundle(200, model.LevelGrid(100))
	other.Site = "wind-b"
	small := testBundle(2, []float64{0.5})

	enc := NewBundleEncoder()
	first := bytes.Clone(encode(t, enc, a))
	again := encode(t, enc, a)
	if !bytes.Equal(first, again) {
		t.Fatal("the same encoder gave different bytes for the same bundle")
	}
	// Scratch buffers holding other, bigger content must not leak in.
	encode(t, enc, other)
	encode(t, enc, small)
	if after := encode(t, enc, a); !bytes.Equal(first, after) {
		t.Error("bytes changed after encoding other bundles")
	}
	if fresh := encode(t, NewBundleEncoder(), a); !bytes.Equal(first, fresh) {
		t.Error("a fresh encoder gave different bytes")
	}
	// A deep copy (different backing arrays) encodes the same.
	c := *a
	c.Levels = append([]float64(nil), a.Levels...)
	c.Q = append([]float64(nil), a.Q...)
	if cp := encode(t, NewBundleEncoder(), &c); !bytes.Equal(first, cp) {
		t.Error("a copy of the bundle gave different bytes")
	}
}

func TestEncodeAppendsToBuffer(t *testing.T) {
	b := testBundle(3, []float64{0.5})
	var buf bytes.Buffer
	buf.WriteString("head")
	if err := NewBundleEncoder().Encode(&buf, b); err != nil {
		t.Fatal(err)
	}
	if !bytes.HasPrefix(buf.Bytes(), []byte("head")) {
		t.Fatal("Encode overwrote what dst held")
	}
	if _, err := DecodeBundle(buf.Bytes()[4:]); err != nil {
		t.Fatalf("appended stream does not decode: %v", err)
	}
}

// dumpSchema writes a readable description of a schema: metadata in order,
// then every field with its type, nullability and metadata.
func dumpSchema(s *arrow.Schema) string {
	var sb strings.Builder
	sb.WriteString("schema metadata:\n")
	md := s.Metadata()
	for i, k := range md.Keys() {
		fmt.Fprintf(&sb, "  %s = %q\n", k, md.Values()[i])
	}
	sb.WriteString("fields:\n")
	for i, f := range s.Fields() {
		null := "not null"
		if f.Nullable {
			null = "nullable"
		}
		fmt.Fprintf(&sb, "  %2d %-14s %-26s %s", i, f.Name, f.Type, null)
		for j, k := range f.Metadata.Keys() {
			fmt.Fprintf(&sb, "  %s=%q", k, f.Metadata.Values()[j])
		}
		sb.WriteString("\n")
	}
	return sb.String()
}

// TestGoldenBundleSchema pins the wire schema for levels 0.05, 0.5, 0.95,
// both as BundleSchema builds it and as a generic reader sees it.
func TestGoldenBundleSchema(t *testing.T) {
	b := testBundle(2, []float64{0.05, 0.5, 0.95})
	want := dumpSchema(BundleSchema(b))
	checkGolden(t, "bundle_schema.txt", []byte(want))

	rdr, err := ipc.NewReader(bytes.NewReader(encode(t, NewBundleEncoder(), b)))
	if err != nil {
		t.Fatal(err)
	}
	defer rdr.Release()
	if got := dumpSchema(rdr.Schema()); got != want {
		t.Errorf("schema on the wire differs from BundleSchema:\n%s\nwant\n%s", got, want)
	}
}

// TestBundleGenericReader reads an encoded bundle with the plain Arrow IPC
// stream reader, by column name and field metadata only, as any Arrow
// library would.
func TestBundleGenericReader(t *testing.T) {
	b := testBundle(96, model.DefaultLevels())
	data := encode(t, NewBundleEncoder(), b)
	if eos := []byte{0xFF, 0xFF, 0xFF, 0xFF, 0, 0, 0, 0}; !bytes.HasSuffix(data, eos) {
		t.Errorf("stream does not end with the end-of-stream marker")
	}
	rdr, err := ipc.NewReader(bytes.NewReader(data), ipc.WithAllocator(memory.NewGoAllocator()))
	if err != nil {
		t.Fatal(err)
	}
	defer rdr.Release()
	schema := rdr.Schema()
	if v, _ := schema.Metadata().GetValue("plumb.watermark"); v != "2026-03-01T10:15:00Z" {
		t.Errorf("plumb.watermark = %q", v)
	}
	batches := 0
	for rdr.Next() {
		batches++
		rec := rdr.RecordBatch()
		if rec.NumRows() != 96 {
			t.Fatalf("%d rows, want 96", rec.NumRows())
		}
		col := func(name string) arrow.Array {
			idx := schema.FieldIndices(name)
			if len(idx) != 1 {
				t.Fatalf("column %q found %d times", name, len(idx))
			}
			return rec.Column(idx[0])
		}
		if got := col("site").(*array.String).Value(95); got != "pv-a" {
			t.Errorf("site = %q", got)
		}
		vs := col("valid_start").(*array.Timestamp)
		toTime, err := vs.DataType().(*arrow.TimestampType).GetToTimeFunc()
		if err != nil {
			t.Fatal(err)
		}
		if got := toTime(vs.Value(4)); !got.Equal(b.Steps[4].ValidStart) {
			t.Errorf("valid_start[4] = %v, want %v", got, b.Steps[4].ValidStart)
		}
		if got := col("lead_minutes").(*array.Int32).Value(4); got != 60 {
			t.Errorf("lead_minutes[4] = %d, want 60", got)
		}
		// Find the median column by its metadata, not its name.
		found := false
		for i, f := range schema.Fields() {
			if lv, ok := f.Metadata.GetValue("plumb.level"); ok && lv == "0.50" {
				found = true
				if u, _ := f.Metadata.GetValue("unit"); u != "MW" {
					t.Errorf("unit of the median column = %q", u)
				}
				got := rec.Column(i).(*array.Float64).Value(7)
				if want := b.Row(7)[9]; got != want {
					t.Errorf("median[7] = %v, want %v", got, want)
				}
			}
		}
		if !found {
			t.Error("no column with plumb.level 0.50")
		}
		if got := col("capacity_mw").(*array.Float64).Value(0); got != 5 {
			t.Errorf("capacity_mw = %v", got)
		}
		for i, c := range rec.Columns() {
			if c.NullN() != 0 || schema.Field(i).Nullable {
				t.Errorf("column %s is nullable or holds nulls", schema.Field(i).Name)
			}
		}
	}
	if err := rdr.Err(); err != nil {
		t.Fatal(err)
	}
	if batches != 1 {
		t.Errorf("%d record batches, want 1", batches)
	}
}

func TestEncodeBundleErrors(t *testing.T) {
	cases := []struct {
		name   string
		mutate func(b *model.Bundle)
	}{
		{"invalid site", func(b *model.Bundle) { b.Site = "pv.a" }},
		{"empty site", func(b *model.Bundle) { b.Site = "" }},
		{"no level", func(b *model.Bundle) { b.Levels, b.Q = nil, nil }},
		{"level 0", func(b *model.Bundle) { b.Levels[0] = 0 }},
		{"level 1", func(b *model.Bundle) { b.Levels[2] = 1 }},
		{"level NaN", func(b *model.Bundle) { b.Levels[1] = math.NaN() }},
		{"levels not increasing", func(b *model.Bundle) { b.Levels[0], b.Levels[1] = b.Levels[1], b.Levels[0] }},
		{"level given twice", func(b *model.Bundle) { b.Levels[1] = b.Levels[0] }},
		{"Q too short", func(b *model.Bundle) { b.Q = b.Q[1:] }},
		{"Expected too long", func(b *model.Bundle) { b.Expected = append(b.Expected, 1) }},
		{"minutes beyond int32", func(b *model.Bundle) { b.Steps[0].LeadMinutes = math.MaxInt32 + 1 }},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			b := testBundle(4, []float64{0.1, 0.5, 0.9})
			tc.mutate(b)
			var buf bytes.Buffer
			buf.WriteString("keep")
			err := NewBundleEncoder().Encode(&buf, b)
			if !errors.Is(err, ErrBadBundle) {
				t.Errorf("error %v, want ErrBadBundle", err)
			}
			if buf.String() != "keep" {
				t.Error("dst changed on error")
			}
		})
	}
}

// genericStream writes an Arrow IPC stream of schema with nbatch record
// batches of nrows rows, filled with plausible values by type; nullCol >= 0
// makes that column's first value null.
func genericStream(t *testing.T, schema *arrow.Schema, nrows, nbatch, nullCol int) []byte {
	t.Helper()
	var buf bytes.Buffer
	w := ipc.NewWriter(&buf, ipc.WithSchema(schema))
	rb := array.NewRecordBuilder(memory.NewGoAllocator(), schema)
	defer rb.Release()
	for range nbatch {
		for c, f := range schema.Fields() {
			for i := range nrows {
				if c == nullCol && i == 0 {
					rb.Field(c).AppendNull()
					continue
				}
				switch fb := rb.Field(c).(type) {
				case *array.StringBuilder:
					fb.Append("pv-a")
				case *array.TimestampBuilder:
					step := int64(i) * 900000
					if f.Name == "issued_at" {
						step = 0
					}
					fb.Append(arrow.Timestamp(1772360100000 + step))
				case *array.Int32Builder:
					fb.Append(15)
				case *array.Float64Builder:
					fb.Append(1)
				default:
					t.Fatalf("no filler for column %s of type %s", f.Name, f.Type)
				}
			}
		}
		rec := rb.NewRecordBatch()
		if err := w.Write(rec); err != nil {
			t.Fatal(err)
		}
		rec.Release()
	}
	if err := w.Close(); err != nil {
		t.Fatal(err)
	}
	return buf.Bytes()
}

func TestDecodeBundleErrors(t *testing.T) {
	base := testBundle(2, []float64{0.05, 0.5, 0.95})
	schema := func(mutate func(md *[]string, fields []arrow.Field) []arrow.Field) *arrow.Schema {
		s := BundleSchema(base)
		keys := append([]string(nil), s.Metadata().Keys()...)
		vals := append([]string(nil), s.Metadata().Values()...)
		fields := append([]arrow.Field(nil), s.Fields()...)
		fields = mutate(&vals, fields)
		md := arrow.NewMetadata(keys, vals)
		return arrow.NewSchema(fields, &md)
	}
	good := BundleSchema(base)
	valid := genericStream(t, good, 3, 1, -1)
	if _, err := DecodeBundle(valid); err != nil {
		t.Fatalf("a generic stream of the bundle schema does not decode: %v", err)
	}
	cases := []struct {
		name string
		data []byte
	}{
		{"empty", nil},
		{"garbage", []byte("not an arrow stream at all")},
		{"truncated", valid[:len(valid)/2]},
		{"schema only", func() []byte {
			var buf bytes.Buffer
			w := ipc.NewWriter(&buf, ipc.WithSchema(good))
			if err := w.Close(); err != nil {
				t.Fatal(err)
			}
			return buf.Bytes()
		}()},
		{"two record batches", genericStream(t, good, 2, 2, -1)},
		{"nulls in a column", genericStream(t, good, 2, 1, 6)},
		{"version 2", genericStream(t, schema(func(md *[]string, f []arrow.Field) []arrow.Field {
			(*md)[0] = "2"
			return f
		}), 1, 1, -1)},
		{"no version", genericStream(t, arrow.NewSchema(good.Fields(), nil), 1, 1, -1)},
		{"bad watermark", genericStream(t, schema(func(md *[]string, f []arrow.Field) []arrow.Field {
			(*md)[4] = "yesterday"
			return f
		}), 1, 1, -1)},
		{"site column differs from metadata", genericStream(t, schema(func(md *[]string, f []arrow.Field) []arrow.Field {
			(*md)[1] = "wind-b"
			return f
		}), 1, 1, -1)},
		{"timestamp in seconds", genericStream(t, schema(func(md *[]string, f []arrow.Field) []arrow.Field {
			f[1].Type = &arrow.TimestampType{Unit: arrow.Second, TimeZone: "UTC"}
			return f
		}), 1, 1, -1)},
		{"timestamp without zone", genericStream(t, schema(func(md *[]string, f []arrow.Field) []arrow.Field {
			f[2].Type = &arrow.TimestampType{Unit: arrow.Millisecond}
			return f
		}), 1, 1, -1)},
		{"columns swapped", genericStream(t, schema(func(md *[]string, f []arrow.Field) []arrow.Field {
			f[3], f[4] = f[4], f[3]
			return f
		}), 1, 1, -1)},
		{"level metadata missing", genericStream(t, schema(func(md *[]string, f []arrow.Field) []arrow.Field {
			f[6].Metadata = arrow.Metadata{}
			return f
		}), 1, 1, -1)},
		{"level metadata not matching the name", genericStream(t, schema(func(md *[]string, f []arrow.Field) []arrow.Field {
			f[6].Metadata = arrow.NewMetadata([]string{"plumb.level"}, []string{"0.6"})
			return f
		}), 1, 1, -1)},
		{"levels decreasing", genericStream(t, schema(func(md *[]string, f []arrow.Field) []arrow.Field {
			f[5], f[7] = f[7], f[5]
			return f
		}), 1, 1, -1)},
		{"no level column", genericStream(t, schema(func(md *[]string, f []arrow.Field) []arrow.Field {
			return append(f[:5:5], f[8:]...)
		}), 1, 1, -1)},
		{"level column of type int32", genericStream(t, schema(func(md *[]string, f []arrow.Field) []arrow.Field {
			f[6].Type = arrow.PrimitiveTypes.Int32
			return f
		}), 1, 1, -1)},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			b, err := DecodeBundle(tc.data)
			if !errors.Is(err, ErrBadBundle) {
				t.Errorf("error %v, want ErrBadBundle", err)
			}
			if b != nil {
				t.Errorf("bundle %+v returned with an error", b)
			}
		})
	}
}

func TestDecodeBundleVaryingRows(t *testing.T) {
	// Columns that are constant in a bundle must be constant on the wire.
	b := testBundle(3, []float64{0.5})
	for _, name := range []string{"issued_at", "capacity_mw", "availability"} {
		t.Run(name, func(t *testing.T) {
			s := BundleSchema(b)
			rb := array.NewRecordBuilder(memory.NewGoAllocator(), s)
			defer rb.Release()
			for i := range 3 {
				rb.Field(0).(*array.StringBuilder).Append("pv-a")
				for c := 1; c <= 2; c++ {
					v := int64(1772360100000)
					if s.Field(c).Name == name {
						v += int64(i) * 60000
					}
					rb.Field(c).(*array.TimestampBuilder).Append(arrow.Timestamp(v))
				}
				rb.Field(3).(*array.Int32Builder).Append(15)
				rb.Field(4).(*array.Int32Builder).Append(0)
				for c := 5; c < s.NumFields(); c++ {
					v := 0.5
					if s.Field(c).Name == name {
						v += float64(i) / 10
					}
					rb.Field(c).(*array.Float64Builder).Append(v)
				}
			}
			rec := rb.NewRecordBatch()
			defer rec.Release()
			var buf bytes.Buffer
			w := ipc.NewWriter(&buf, ipc.WithSchema(s))
			if err := w.Write(rec); err != nil {
				t.Fatal(err)
			}
			if err := w.Close(); err != nil {
				t.Fatal(err)
			}
			if _, err := DecodeBundle(buf.Bytes()); !errors.Is(err, ErrBadBundle) {
				t.Errorf("error %v, want ErrBadBundle", err)
			}
		})
	}
}

// TestEncodeBundleAllocs bounds the allocations of a warm encoder: the
// column buffers are reused, what remains is Arrow's per-message work.
func TestEncodeBundleAllocs(t *testing.T) {
	b := testBundle(144, model.DefaultLevels())
	enc := NewBundleEncoder()
	var buf bytes.Buffer
	n := testing.AllocsPerRun(50, func() {
		buf.Reset()
		if err := enc.Encode(&buf, b); err != nil {
			t.Fatal(err)
		}
	})
	const limit = 400
	if n > limit {
		t.Errorf("%v allocations per Encode, want at most %d", n, limit)
	}
	t.Logf("%v allocations per Encode of 144 steps x 19 levels", n)
}

func FuzzDecodeBundle(f *testing.F) {
	enc := NewBundleEncoder()
	for _, b := range []*model.Bundle{testBundle(3, []float64{0.05, 0.5, 0.95}), testBundle(1, []float64{0.5}), testBundle(0, []float64{0.5})} {
		var buf bytes.Buffer
		if err := enc.Encode(&buf, b); err != nil {
			f.Fatal(err)
		}
		f.Add(buf.Bytes())
	}
	f.Add([]byte{})
	f.Fuzz(func(t *testing.T, data []byte) {
		b, err := DecodeBundle(data)
		if err != nil {
			if !errors.Is(err, ErrBadBundle) || b != nil {
				t.Fatalf("error %v does not wrap ErrBadBundle, or bundle returned", err)
			}
			return
		}
		// Whatever decodes is a consistent bundle that encodes again.
		if len(b.Q) != len(b.Steps)*len(b.Levels) || len(b.Expected) != len(b.Steps) {
			t.Fatalf("inconsistent lengths: %d steps, %d levels, %d quantiles", len(b.Steps), len(b.Levels), len(b.Q))
		}
		var buf bytes.Buffer
		if err := NewBundleEncoder().Encode(&buf, b); err != nil {
			if !model.ValidID(b.Site) { // the site comes from metadata as is
				return
			}
			t.Fatalf("decoded bundle does not encode: %v", err)
		}
	})
}

func BenchmarkEncodeBundle(b *testing.B) {
	bundle := testBundle(144, model.DefaultLevels())
	enc := NewBundleEncoder()
	var buf bytes.Buffer
	b.ReportAllocs()
	for b.Loop() {
		buf.Reset()
		if err := enc.Encode(&buf, bundle); err != nil {
			b.Fatal(err)
		}
	}
	b.SetBytes(int64(buf.Len()))
}

func BenchmarkDecodeBundle(b *testing.B) {
	bundle := testBundle(144, model.DefaultLevels())
	var buf bytes.Buffer
	if err := NewBundleEncoder().Encode(&buf, bundle); err != nil {
		b.Fatal(err)
	}
	data := buf.Bytes()
	b.SetBytes(int64(len(data)))
	b.ReportAllocs()
	for b.Loop() {
		if _, err := DecodeBundle(data); err != nil {
			b.Fatal(err)
		}
	}
}
