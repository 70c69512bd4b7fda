package worker

import (
	"bytes"
	"context"
	"testing"

	"go.uber.org/zap"

	"github.com/plumb-forecast/plumb/model/synth"
	"github.com/plumb-forecast/plumb/stream/jet"
	"github.com/plumb-forecast/plumb/stream/jet/jettest"
)

// TestSnapshotWritesOnlyMoveForward: the snapshot writer keeps the stored
// snapshot when asked to write one covering less of the input stream (a
// worker that lost its lease without knowing it, writing after its
// successor), and replaces it with one covering as much or more.
func TestSnapshotWritesOnlyMoveForward(t *testing.T) {
	url := jettest.Server(t)
	_, js := jettest.Connect(t, url)
	ctx := context.Background()
	if err := jet.Ensure(ctx, js, jet.Layout{}); err != nil {
		t.Fatal(err)
	}
	kv, err := js.KeyValue(ctx, jet.SnapshotBucket)
	if err != nil {
		t.Fatal(err)
	}
	site := synth.Fleet(synth.FleetOptions{Days: 1}).Sites[0]
	a, err := NewActor(site, Config{}.WithDefaults())
	if err != nil {
		t.Fatal(err)
	}
	snap := func(seq uint64) []byte {
		data, err := a.Snapshot(seq)
		if err != nil {
			t.Fatal(err)
		}
		if got, err := SnapshotSeq(data); err != nil || got != seq {
			t.Fatalf("SnapshotSeq = %d, %v; want %d", got, err, seq)
		}
		return data
	}
	w := NewDurableSnapshots(4)
	w.start(js, kv, zap.NewNop(), NewMetrics(nil))
	defer w.stop()
	stored := func() []byte {
		e, err := kv.Get(ctx, site.ID)
		if err != nil {
			t.Fatal(err)
		}
		return e.Value()
	}
	for _, step := range []struct {
		seq  uint64
		want uint64 // the sequence stored afterwards
	}{{10, 10}, {5, 10}, {10, 10}, {11, 11}, {0, 11}, {400, 400}} {
		if err := w.sync(ctx, site.ID, step.seq, snap(step.seq)); err != nil {
			t.Fatal(err)
		}
		if got, _ := SnapshotSeq(stored()); got != step.want {
			t.Errorf("after writing sequence %d the bucket holds %d, want %d", step.seq, got, step.want)
		}
	}
	// A stored value that is not a snapshot of this version is replaced.
	if _, err := kv.Put(ctx, site.ID, []byte("not a snapshot")); err != nil {
		t.Fatal(err)
	}
	if err := w.sync(ctx, site.ID, 3, snap(3)); err != nil {
		t.Fatal(err)
	}
	if !bytes.Equal(stored(), snap(3)) {
		t.Error("an unreadable stored value was not replaced")
	}
}
