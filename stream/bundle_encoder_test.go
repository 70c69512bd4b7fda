package stream

import (
	"bytes"
	"fmt"
	"math"
	"math/rand/v2"
	"testing"
	"time"

	"github.com/plumb-forecast/plumb/model"
)

// arrowEncode returns b's stream as the Arrow IPC writer makes it (the
// encoder's slow path, which every shape goes through once).
func arrowEncode(t testing.TB, b *model.Bundle) []byte {
	t.Helper()
	e := NewBundleEncoder()
	e.levels = append(e.levels[:0], b.Levels...)
	e.fields = bundleFields(e.levels)
	var buf bytes.Buffer
	if err := e.encodeArrow(&buf, b); err != nil {
		t.Fatal(err)
	}
	return buf.Bytes()
}

// randomBundle is an invented bundle whose every varying part is drawn:
// site id, model and calibrator names of various lengths, times with and
// without fractions of a second (and a zero weather issue time), steps of
// varying length, and values that include 0, -0, NaN, infinities and
// subnormals.
func randomBundle(rng *rand.Rand, steps int, levels []float64) *model.Bundle {
	ids := []string{"a", "pv-a", "wind-gorse-hill", "site_0123456789_with_a_long_identifier"}
	names := []string{"", "aci", "baseline", "none", "climatology"}
	issued := time.Date(2026, 1, 1, 0, 0, 0, 0, time.UTC).Add(time.Duration(rng.IntN(1e6)) * time.Minute)
	if rng.IntN(3) == 0 {
		issued = issued.Add(time.Duration(rng.IntN(1e9)))
	}
	b := &model.Bundle{
		Site:         ids[rng.IntN(len(ids))],
		IssuedAt:     issued,
		Watermark:    issued.Add(time.Duration(rng.IntN(3)) * time.Second),
		Model:        names[rng.IntN(len(names))],
		Calibrator:   names[rng.IntN(len(names))],
		CapacityMW:   rng.Float64() * 100,
		Availability: rng.Float64(),
		Levels:       levels,
		Steps:        make([]model.Step, steps),
		Q:            make([]float64, steps*len(levels)),
		Expected:     make([]float64, steps),
	}
	if rng.IntN(4) != 0 {
		b.WeatherIssuedAt = issued.Add(-time.Duration(rng.IntN(1e5)) * time.Second)
	}
	if rng.IntN(5) == 0 {
		b.IssuedAt = b.IssuedAt.In(time.FixedZone("east", 3600))
	}
	special := []float64{0, math.Copysign(0, -1), math.NaN(), math.Inf(1), math.Inf(-1), 5e-324, math.MaxFloat64}
	value := func() float64 {
		if rng.IntN(20) == 0 {
			return special[rng.IntN(len(special))]
		}
		return rng.NormFloat64() * 10
	}
	for i := range b.Steps {
		b.Steps[i] = model.Step{ValidStart: issued.Add(time.Duration(i) * 15 * time.Minute), ValidMinutes: 15 * (1 + rng.IntN(4)), LeadMinutes: 15*i - rng.IntN(20)}
		b.Expected[i] = value()
	}
	for k := range b.Q {
		b.Q[k] = value()
	}
	return b
}

// TestEncoderFastPathMatchesArrow: a warm encoder, writing from its
// templates, gives exactly the Arrow IPC writer's bytes, whatever the
// bundle's content, and it does take the fast path for every shape drawn.
func TestEncoderFastPathMatchesArrow(t *testing.T) {
	rng := rand.New(rand.NewPCG(7, 11))
	for _, levels := range [][]float64{{0.5}, model.LevelGrid(10), model.DefaultLevels(), model.LevelGrid(100), {0.025, 0.5, 0.975}} {
		for _, steps := range []int{0, 1, 2, 3, 7, 48, 144, 193} {
			t.Run(fmt.Sprintf("levels=%d/steps=%d", len(levels), steps), func(t *testing.T) {
				e := NewBundleEncoder()
				for k := range 12 {
					b := randomBundle(rng, steps, levels)
					want := arrowEncode(t, b)
					// Encode twice: the first may learn templates, the
					// second must use them.
					for pass := range 2 {
						var buf bytes.Buffer
						buf.WriteString("prefix") // Encode appends
						if err := e.Encode(&buf, b); err != nil {
							t.Fatal(err)
						}
						if got := buf.Bytes()[len("prefix"):]; !bytes.Equal(got, want) {
							t.Fatalf("bundle %d pass %d: %d bytes differ from the Arrow writer's %d", k, pass, len(got), len(want))
						}
					}
				}
				for sh, st := range e.schemas {
					if !st.ok {
						t.Errorf("schema template of shape %+v not usable", sh)
					}
				}
				for sh, bt := range e.batches {
					if !bt.ok {
						t.Errorf("record batch template of shape %+v not usable", sh)
					}
				}
			})
		}
	}
}

// TestEncoderFastPathDecodes: what the fast path writes decodes to the
// bundle encoded.
func TestEncoderFastPathDecodes(t *testing.T) {
	e := NewBundleEncoder()
	b := testBundle(144, model.DefaultLevels())
	encode(t, e, b)
	got, err := DecodeBundle(encode(t, e, b))
	if err != nil {
		t.Fatal(err)
	}
	if got.Site != b.Site || !got.Watermark.Equal(b.Watermark) || len(got.Q) != len(b.Q) {
		t.Fatalf("decoded %+v", got)
	}
	for k := range b.Q {
		if got.Q[k] != b.Q[k] {
			t.Fatalf("quantile %d: %v, want %v", k, got.Q[k], b.Q[k])
		}
	}
}

// TestEncodeWarmDoesNotAllocate: once an encoder has seen a bundle's shape,
// Encode into a buffer with room allocates nothing.
func TestEncodeWarmDoesNotAllocate(t *testing.T) {
	for _, steps := range []int{48, 144, 192} {
		for _, levels := range [][]float64{model.LevelGrid(10), model.DefaultLevels(), model.LevelGrid(100)} {
			b := testBundle(steps, levels)
			e := NewBundleEncoder()
			var buf bytes.Buffer
			encode(t, e, b)
			n := testing.AllocsPerRun(50, func() {
				buf.Reset()
				if err := e.Encode(&buf, b); err != nil {
					t.Fatal(err)
				}
			})
			if n != 0 {
				t.Errorf("steps %d levels %d: %v allocations per Encode, want 0", steps, len(levels), n)
			}
		}
	}
}

// BenchmarkEncodeBundleSizes times a warm encoder (the fast path) at the
// bundle sizes of the worker's benchmarks; Arrow is the Arrow IPC writer
// alone, as every bundle was written before the fast path.
func BenchmarkEncodeBundleSizes(b *testing.B) {
	for _, steps := range []int{48, 144, 192} {
		for _, nl := range []int{9, 19, 99} {
			levels := model.LevelGrid(nl + 1)
			bundle := testBundle(steps, levels)
			b.Run(fmt.Sprintf("steps=%d/levels=%d", steps, nl), func(b *testing.B) {
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
			})
			b.Run(fmt.Sprintf("Arrow/steps=%d/levels=%d", steps, nl), func(b *testing.B) {
				enc := NewBundleEncoder()
				enc.levels = append(enc.levels[:0], bundle.Levels...)
				enc.fields = bundleFields(enc.levels)
				var buf bytes.Buffer
				b.ReportAllocs()
				for b.Loop() {
					buf.Reset()
					if err := enc.encodeArrow(&buf, bundle); err != nil {
						b.Fatal(err)
					}
				}
				b.SetBytes(int64(buf.Len()))
			})
		}
	}
}
