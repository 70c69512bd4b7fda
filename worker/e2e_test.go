package worker

import (
	"bytes"
	"context"
	"encoding/json"
	"flag"
	"fmt"
	"os"
	"path/filepath"
	"sort"
	"strings"
	"testing"
	"time"

	"github.com/apache/arrow-go/v18/arrow"
	"github.com/apache/arrow-go/v18/arrow/ipc"
	"github.com/nats-io/nats.go"

	"github.com/plumb-forecast/plumb/model"
	"github.com/plumb-forecast/plumb/stream"
)

// bus is a worker on an embedded NATS server on a random port, with a
// subscriber collecting its outputs.
type bus struct {
	nc      *nats.Conn
	bundles chan *nats.Msg
	alarms  chan *nats.Msg
	rejects chan *nats.Msg
	pool    *Pool
}

func startBus(t *testing.T, sites []model.Site, o PoolOptions) *bus {
	t.Helper()
	emb, err := stream.StartEmbedded(stream.EmbeddedOptions{Port: -1, StoreDir: t.TempDir()})
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(emb.Shutdown)
	wnc, err := stream.Connect(stream.ConnOptions{URL: emb.URL(), Name: "worker"})
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(wnc.Close)
	pool, err := NewPool(sites, Config{}, NewNATSOutput(wnc), o)
	if err != nil {
		t.Fatal(err)
	}
	nc, err := stream.Connect(stream.ConnOptions{URL: emb.URL(), Name: "test"})
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(nc.Close)
	b := &bus{nc: nc, pool: pool,
		bundles: make(chan *nats.Msg, 100000), alarms: make(chan *nats.Msg, 10000), rejects: make(chan *nats.Msg, 1000)}
	for subj, ch := range map[string]chan *nats.Msg{
		stream.QuantilesWildcard: b.bundles, stream.AlarmsWildcard: b.alarms, stream.RejectsSubject: b.rejects} {
		if _, err := nc.ChanSubscribe(subj, ch); err != nil {
			t.Fatal(err)
		}
	}
	if err := nc.Flush(); err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	ready := make(chan struct{})
	done := make(chan error, 1)
	go func() { done <- Serve(ctx, wnc, pool, ready) }()
	t.Cleanup(func() {
		cancel()
		if err := <-done; err != nil {
			t.Errorf("serve: %v", err)
		}
	})
	select {
	case <-ready:
	case err := <-done:
		t.Fatalf("serve ended early: %v", err)
	}
	return b
}

func (b *bus) publish(t *testing.T, subj string, data []byte) {
	t.Helper()
	if err := b.nc.Publish(subj, data); err != nil {
		t.Fatal(err)
	}
}

func (b *bus) publishRun(t *testing.T, r *model.WeatherRun) {
	t.Helper()
	b.publish(t, stream.WeatherSubject(r.Site), stream.AppendWeatherJSON(nil, r))
}

func (b *bus) publishReading(t *testing.T, r *model.Reading) {
	t.Helper()
	b.publish(t, stream.MeterSubject(r.Site), stream.AppendMeterJSON(nil, r))
}

func recv(t *testing.T, ch chan *nats.Msg, what string) *nats.Msg {
	t.Helper()
	select {
	case m := <-ch:
		return m
	case <-time.After(10 * time.Second):
		t.Fatalf("no %s within 10 s", what)
	}
	return nil
}

// TestEndToEnd publishes weather and meter messages to a worker on an
// embedded server and checks the bundles it publishes: the schema against
// the golden file, one column per level with its level in the metadata,
// monotone quantiles within [0, capacity], and times consistent with the
// inputs' event time.
func TestEndToEnd(t *testing.T) {
	sites := testSites()
	b := startBus(t, sites, PoolOptions{PublishAll: true})
	pv := sites[0]
	f := makeFeed(pv, 2, 9)
	b.publishRun(t, &f.runs[0])
	m := recv(t, b.bundles, "bundle after a weather run")
	if m.Subject != stream.QuantilesSubject(pv.ID) {
		t.Fatalf("bundle on %s", m.Subject)
	}
	ri := 1
	var last *model.Bundle
	for i := 0; i < 48; i++ {
		r := f.readings[i]
		for ri < len(f.runs) && !f.runs[ri].IssuedAt.After(r.End()) {
			b.publishRun(t, &f.runs[ri])
			recv(t, b.bundles, "bundle after a weather run")
			ri++
		}
		b.publishReading(t, &r)
		m := recv(t, b.bundles, "bundle after a reading")
		bd, err := stream.DecodeBundle(m.Data)
		if err != nil {
			t.Fatal(err)
		}
		if !bd.IssuedAt.Equal(r.End()) {
			t.Fatalf("bundle issued %s, want the reading's end %s", bd.IssuedAt, r.End())
		}
		if !bd.WeatherIssuedAt.Equal(f.runs[ri-1].IssuedAt) {
			t.Fatalf("bundle used weather run %s, want the newest, %s", bd.WeatherIssuedAt, f.runs[ri-1].IssuedAt)
		}
		for k, s := range bd.Steps {
			if want := bd.IssuedAt.Add(time.Duration(k) * 15 * time.Minute); !s.ValidStart.Equal(want) || s.ValidMinutes != 15 {
				t.Fatalf("step %d: %+v, want start %s, 15 minutes", k, s, want)
			}
			row := bd.Row(k)
			for j := range row {
				if row[j] < 0 || row[j] > pv.CapacityMW || (j > 0 && row[j] < row[j-1]) {
					t.Fatalf("step %d: quantiles %v not monotone within [0, %v]", k, row, pv.CapacityMW)
				}
			}
		}
		last = bd
		checkSchema(t, m.Data, bd.Levels)
	}
	if last.Site != pv.ID || last.CapacityMW != pv.CapacityMW || len(last.Levels) != 19 {
		t.Fatalf("last bundle: site %s capacity %v levels %d", last.Site, last.CapacityMW, len(last.Levels))
	}
}

// checkSchema reads a bundle with the generic Arrow IPC reader and checks
// its schema against testdata/golden/bundle_schema_e2e.txt.
func checkSchema(t *testing.T, data []byte, levels []float64) {
	t.Helper()
	rd, err := ipc.NewReader(bytes.NewReader(data))
	if err != nil {
		t.Fatal(err)
	}
	defer rd.Release()
	sc := rd.Schema()
	if !rd.Next() {
		t.Fatalf("no record batch: %v", rd.Err())
	}
	fields := sc.Fields()
	want := []string{"site", "issued_at", "valid_start", "valid_minutes", "lead_minutes"}
	for _, l := range levels {
		want = append(want, model.LevelColumn(l))
	}
	want = append(want, "expected_mw", "capacity_mw", "availability")
	if len(fields) != len(want) {
		t.Fatalf("%d fields, want %d", len(fields), len(want))
	}
	for i, f := range fields {
		if f.Name != want[i] {
			t.Fatalf("field %d is %q, want %q", i, f.Name, want[i])
		}
		if i >= 5 && i < 5+len(levels) {
			if f.Type.ID() != arrow.FLOAT64 {
				t.Fatalf("%s is %s, want float64", f.Name, f.Type)
			}
			v, ok := f.Metadata.GetValue("plumb.level")
			if !ok || v != model.FormatLevel(levels[i-5]) {
				t.Fatalf("%s: level metadata %q, want %q", f.Name, v, model.FormatLevel(levels[i-5]))
			}
		}
	}
	if rec := rd.RecordBatch(); rec.NumCols() != int64(len(want)) {
		t.Fatalf("record has %d columns", rec.NumCols())
	}
	// The whole schema, against the golden file.
	var dump strings.Builder
	for _, f := range fields {
		fmt.Fprintf(&dump, "%s: %s nullable=%v", f.Name, f.Type, f.Nullable)
		for i, k := range f.Metadata.Keys() {
			fmt.Fprintf(&dump, " %s=%s", k, f.Metadata.Values()[i])
		}
		dump.WriteByte('\n')
	}
	keys := append([]string(nil), sc.Metadata().Keys()...)
	sort.Strings(keys)
	fmt.Fprintf(&dump, "schema metadata keys: %s\n", strings.Join(keys, " "))
	golden := filepath.Join("..", "testdata", "golden", "bundle_schema_e2e.txt")
	if *update {
		if err := os.WriteFile(golden, []byte(dump.String()), 0o644); err != nil {
			t.Fatal(err)
		}
	}
	wantDump, err := os.ReadFile(golden)
	if err != nil {
		t.Fatalf("%v (run go test ./worker -run EndToEnd -update to create it)", err)
	}
	if dump.String() != string(wantDump) {
		t.Fatalf("bundle schema differs from %s:\n%s\nwant:\n%s", golden, dump.String(), wantDump)
	}
}

var update = flag.Bool("update", false, "rewrite golden files")

// TestRejects sends each kind of bad input on the bus and checks the reject
// reason; a good message after them is still processed.
func TestRejects(t *testing.T) {
	sites := testSites()
	b := startBus(t, sites, PoolOptions{PublishAll: true})
	w := sites[1]
	f := makeFeed(w, 1, 5)
	b.publishRun(t, &f.runs[0])
	recv(t, b.bundles, "bundle")
	good := f.readings[0]
	b.publishReading(t, &good)
	recv(t, b.bundles, "bundle")

	meter := func(s string) []byte { return []byte(s) }
	at := func(d time.Duration) string { return f.readings[1].IntervalStart.Add(d).Format(time.RFC3339) }
	cases := []struct {
		name, subject string
		data          []byte
		reason        stream.Reason
	}{
		{"malformed JSON", stream.MeterSubject(w.ID), meter(`{"site":`), stream.ReasonMalformed},
		{"missing power", stream.MeterSubject(w.ID), meter(`{"site":"wind-test","interval_start":"` + at(0) + `","interval_minutes":15}`), stream.ReasonMissingField},
		{"unknown site", "plumb.in.meter.nowhere", meter(`{"site":"nowhere","interval_start":"` + at(0) + `","interval_minutes":15,"power_mw":1}`), stream.ReasonUnknownSite},
		{"NaN power", stream.MeterSubject(w.ID), meter(`{"site":"wind-test","interval_start":"` + at(0) + `","interval_minutes":15,"power_mw":"NaN"}`), stream.ReasonNotFinite},
		{"negative power", stream.MeterSubject(w.ID), meter(`{"site":"wind-test","interval_start":"` + at(0) + `","interval_minutes":15,"power_mw":-3}`), stream.ReasonOutOfRange},
		{"power far above capacity", stream.MeterSubject(w.ID), meter(`{"site":"wind-test","interval_start":"` + at(0) + `","interval_minutes":15,"power_mw":400}`), stream.ReasonOutOfRange},
		{"misaligned interval", stream.MeterSubject(w.ID), meter(`{"site":"wind-test","interval_start":"` + at(7*time.Minute) + `","interval_minutes":15,"power_mw":1}`), stream.ReasonBadInterval},
		{"zero-length interval", stream.MeterSubject(w.ID), meter(`{"site":"wind-test","interval_start":"` + at(0) + `","interval_minutes":0,"power_mw":1}`), stream.ReasonBadInterval},
		{"absurd timestamp", stream.MeterSubject(w.ID), meter(`{"site":"wind-test","interval_start":"2391-01-01T00:00:00Z","interval_minutes":15,"power_mw":1}`), stream.ReasonBadTime},
		{"far ahead of the site", stream.MeterSubject(w.ID), meter(`{"site":"wind-test","interval_start":"2029-01-01T00:00:00Z","interval_minutes":15,"power_mw":1}`), stream.ReasonBadTime},
		{"oversize payload", stream.MeterSubject(w.ID), meter(`{"site":"wind-test","note":"` + strings.Repeat("x", 2<<20) + `"}`), stream.ReasonTooLarge},
		{"duplicate reading", stream.MeterSubject(w.ID), stream.AppendMeterJSON(nil, &good), stream.ReasonDuplicate},
		{"too late", stream.MeterSubject(w.ID), meter(`{"site":"wind-test","interval_start":"` + at(-30*time.Hour) + `","interval_minutes":15,"power_mw":1}`), stream.ReasonTooLate},
		{"site mismatch", stream.MeterSubject(w.ID), meter(`{"site":"pv-test","interval_start":"` + at(0) + `","interval_minutes":15,"power_mw":1}`), stream.ReasonSiteMismatch},
		{"duplicate weather run", stream.WeatherSubject(w.ID), stream.AppendWeatherJSON(nil, &f.runs[0]), stream.ReasonDuplicate},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			b.publish(t, c.subject, c.data)
			m := recv(t, b.rejects, "reject")
			var r stream.Reject
			if err := json.Unmarshal(m.Data, &r); err != nil {
				t.Fatal(err)
			}
			if r.Reason != string(c.reason) {
				t.Fatalf("reason %q (%s), want %q", r.Reason, r.Detail, c.reason)
			}
			if r.Subject != c.subject || r.Bytes != len(c.data) {
				t.Fatalf("reject %+v: subject or size wrong", r)
			}
		})
	}
	// The worker carries on: the next good reading gives a bundle.
	next := f.readings[1]
	b.publishReading(t, &next)
	m := recv(t, b.bundles, "bundle after the bad inputs")
	bd, err := stream.DecodeBundle(m.Data)
	if err != nil {
		t.Fatal(err)
	}
	if !bd.IssuedAt.Equal(next.End()) {
		t.Fatalf("bundle issued %s, want %s", bd.IssuedAt, next.End())
	}
	select {
	case m := <-b.rejects:
		t.Fatalf("unexpected reject %s", m.Data)
	default:
	}
}

// TestReplayTwiceIdentical replays the same inputs through the bus into two
// fresh workers and checks that the bundles are byte-identical (DESIGN.md:
// event time, no wall clock in the path).
func TestReplayTwiceIdentical(t *testing.T) {
	run := func() map[string][][]byte {
		sites := testSites()
		b := startBus(t, sites, PoolOptions{PublishAll: true})
		var want int
		for _, s := range sites {
			f := makeFeed(s, 3, 11)
			ri := 0
			for _, r := range f.readings {
				for ri < len(f.runs) && !f.runs[ri].IssuedAt.After(r.End()) {
					b.publishRun(t, &f.runs[ri])
					ri++
					want++
				}
				b.publishReading(t, &r)
				want++
			}
		}
		got := map[string][][]byte{}
		for i := 0; i < want; i++ {
			m := recv(t, b.bundles, fmt.Sprintf("bundle %d of %d", i+1, want))
			got[m.Subject] = append(got[m.Subject], m.Data)
		}
		return got
	}
	a, c := run(), run()
	if len(a) != 2 {
		t.Fatalf("bundles of %d sites, want 2", len(a))
	}
	for subj, bs := range a {
		if len(bs) != len(c[subj]) {
			t.Fatalf("%s: %d and %d bundles", subj, len(bs), len(c[subj]))
		}
		for i := range bs {
			if !bytes.Equal(bs[i], c[subj][i]) {
				t.Fatalf("%s: bundle %d differs", subj, i)
			}
		}
	}
}
