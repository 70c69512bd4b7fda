package jet_test

import (
	"context"
	"errors"
	"testing"
	"time"

	"github.com/nats-io/nats.go/jetstream"

	"github.com/plumb-forecast/plumb/stream"
	"github.com/plumb-forecast/plumb/stream/jet"
	"github.com/plumb-forecast/plumb/stream/jet/jettest"
)

func TestLayoutInvalid(t *testing.T) {
	tests := []struct {
		name string
		l    jet.Layout
	}{
		{"negative partitions", jet.Layout{Partitions: -1}},
		{"six replicas", jet.Layout{Replicas: 6}},
		{"negative replicas", jet.Layout{Replicas: -1}},
		{"negative window", jet.Layout{DuplicateWindow: -time.Second}},
		{"window beyond max age", jet.Layout{DuplicateWindow: time.Hour, InputMaxAge: time.Minute}},
		{"negative max bytes", jet.Layout{InputMaxBytes: -1}},
		{"lease TTL under a second", jet.Layout{LeaseTTL: 500 * time.Millisecond}},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			if _, err := tt.l.InputStreamConfig(); !errors.Is(err, jet.ErrBadLayout) {
				t.Errorf("error = %v, want ErrBadLayout", err)
			}
			// Ensure refuses before talking to the server.
			if err := jet.Ensure(context.Background(), nil, tt.l); !errors.Is(err, jet.ErrBadLayout) {
				t.Errorf("Ensure error = %v, want ErrBadLayout", err)
			}
		})
	}
}

// TestLayoutDefaults checks the documented defaults of a zero Layout.
func TestLayoutDefaults(t *testing.T) {
	var l jet.Layout
	in, err := l.InputStreamConfig()
	if err != nil {
		t.Fatal(err)
	}
	if in.Duplicates != 2*time.Minute || in.MaxAge != 7*24*time.Hour || in.Replicas != 1 || in.MaxBytes != -1 {
		t.Errorf("input stream: duplicates %v, max age %v, replicas %d, max bytes %d", in.Duplicates, in.MaxAge, in.Replicas, in.MaxBytes)
	}
	if _, want := jet.PartitionMapping(16); in.SubjectTransform.Destination != want {
		t.Errorf("input transform %q, want %q", in.SubjectTransform.Destination, want)
	}
	b, _ := l.BundleStreamConfig()
	if b.MaxMsgsPerSubject != 1 || b.MaxAge != 48*time.Hour {
		t.Errorf("bundle stream: max per subject %d, max age %v", b.MaxMsgsPerSubject, b.MaxAge)
	}
	lb, _ := l.LeaseBucketConfig()
	if lb.TTL != 10*time.Second || lb.LimitMarkerTTL != 10*time.Second {
		t.Errorf("lease bucket: TTL %v, marker TTL %v", lb.TTL, lb.LimitMarkerTTL)
	}
}

func TestEnsure(t *testing.T) {
	_, js := jettest.Connect(t, jettest.Server(t))
	ctx, cancel := context.WithTimeout(context.Background(), 20*time.Second)
	defer cancel()

	l := jet.Layout{Partitions: 8, LeaseTTL: 2 * time.Second}
	if err := jet.Ensure(ctx, js, l); err != nil {
		t.Fatal(err)
	}
	// A second run changes nothing and succeeds; so does a run changing a
	// limit.
	if err := jet.Ensure(ctx, js, l); err != nil {
		t.Fatalf("second Ensure: %v", err)
	}
	l.InputMaxAge = 24 * time.Hour
	if err := jet.Ensure(ctx, js, l); err != nil {
		t.Fatalf("Ensure with a new max age: %v", err)
	}
	s, err := js.Stream(ctx, jet.InputStream)
	if err != nil {
		t.Fatal(err)
	}
	if got := s.CachedInfo().Config.MaxAge; got != 24*time.Hour {
		t.Errorf("input max age %v after update, want 24h", got)
	}
	for _, name := range []string{jet.BundleStream, "KV_" + jet.SnapshotBucket, "KV_" + jet.LeaseBucket} {
		if _, err := js.Stream(ctx, name); err != nil {
			t.Errorf("stream %s: %v", name, err)
		}
	}
	kv, err := js.KeyValue(ctx, jet.LeaseBucket)
	if err != nil {
		t.Fatal(err)
	}
	st, err := kv.Status(ctx)
	if err != nil {
		t.Fatal(err)
	}
	if st.TTL() != 2*time.Second || st.LimitMarkerTTL() != 2*time.Second {
		t.Errorf("lease bucket TTL %v, marker TTL %v; want 2s, 2s", st.TTL(), st.LimitMarkerTTL())
	}

	// Another partition count is refused and changes nothing.
	if err := jet.Ensure(ctx, js, jet.Layout{Partitions: 9, LeaseTTL: 2 * time.Second}); !errors.Is(err, jet.ErrPartitionsChanged) {
		t.Fatalf("Ensure with 9 partitions: %v, want ErrPartitionsChanged", err)
	}
	s, err = js.Stream(ctx, jet.InputStream)
	if err != nil {
		t.Fatal(err)
	}
	if _, want := jet.PartitionMapping(8); s.CachedInfo().Config.SubjectTransform.Destination != want {
		t.Errorf("transform changed to %q", s.CachedInfo().Config.SubjectTransform.Destination)
	}
}

// TestLatestBundle checks that a reader starting late gets exactly the
// latest bundle of each site.
func TestLatestBundle(t *testing.T) {
	nc, js := jettest.Connect(t, jettest.Server(t))
	ctx, cancel := context.WithTimeout(context.Background(), 20*time.Second)
	defer cancel()
	if err := jet.Ensure(ctx, js, jet.Layout{}); err != nil {
		t.Fatal(err)
	}
	// Workers publish bundles with core NATS; the stream captures them.
	for _, b := range []struct{ site, data string }{
		{"north-1", "n1"}, {"south-2", "s1"}, {"north-1", "n2"}, {"north-1", "n3"}, {"south-2", "s2"},
	} {
		if err := nc.Publish(stream.QuantilesSubject(b.site), []byte(b.data)); err != nil {
			t.Fatal(err)
		}
	}
	if err := nc.Flush(); err != nil {
		t.Fatal(err)
	}
	s, err := js.Stream(ctx, jet.BundleStream)
	if err != nil {
		t.Fatal(err)
	}
	// Core publishes are stored asynchronously: poll.
	for {
		info, err := s.Info(ctx)
		if err != nil {
			t.Fatal(err)
		}
		if info.State.LastSeq == 5 {
			if info.State.Msgs != 2 {
				t.Fatalf("bundle stream holds %d messages, want 2 (one per site)", info.State.Msgs)
			}
			break
		}
		if ctx.Err() != nil {
			t.Fatal("bundles not stored")
		}
		time.Sleep(10 * time.Millisecond)
	}
	c, err := s.OrderedConsumer(ctx, jetstream.OrderedConsumerConfig{DeliverPolicy: jetstream.DeliverLastPerSubjectPolicy})
	if err != nil {
		t.Fatal(err)
	}
	batch, err := c.FetchNoWait(10)
	if err != nil {
		t.Fatal(err)
	}
	got := map[string]string{}
	for m := range batch.Messages() {
		got[m.Subject()] = string(m.Data())
	}
	want := map[string]string{stream.QuantilesSubject("north-1"): "n3", stream.QuantilesSubject("south-2"): "s2"}
	if len(got) != len(want) || got[stream.QuantilesSubject("north-1")] != "n3" || got[stream.QuantilesSubject("south-2")] != "s2" {
		t.Errorf("late reader got %v, want %v", got, want)
	}
	// A direct get of the last message of a subject answers too.
	m, err := s.GetLastMsgForSubject(ctx, stream.QuantilesSubject("north-1"))
	if err != nil || string(m.Data) != "n3" {
		t.Errorf("last bundle of north-1: %v, %v", m, err)
	}
}
