package jet_test

import (
	"bytes"
	"context"
	"strings"
	"testing"

	"github.com/plumb-forecast/plumb/stream/jet"
	"github.com/plumb-forecast/plumb/stream/jet/jettest"
)

// TestLatestSeesEveryConfirmedWrite writes a key many times on a
// three-server cluster with three replicas, each time reading it back at
// once through Latest from a client of another server: the read always
// returns the value just confirmed (a direct get may be answered by a
// follower that lags). It also reads a missing and a deleted key.
func TestLatestSeesEveryConfirmedWrite(t *testing.T) {
	if testing.Short() {
		t.Skip("starts a three-server cluster")
	}
	urls := jettest.Cluster(t, 3)
	_, wjs := jettest.Connect(t, urls[0])
	_, rjs := jettest.Connect(t, urls[2])
	ctx := context.Background()
	l := jet.Layout{Replicas: 3}
	if err := jet.Ensure(ctx, wjs, l); err != nil {
		t.Fatal(err)
	}
	kv, err := wjs.KeyValue(ctx, jet.SnapshotBucket)
	if err != nil {
		t.Fatal(err)
	}
	v, err := jet.Latest(ctx, rjs, jet.SnapshotBucket, "nowhere")
	if err != nil || v.Found || v.Revision != 0 {
		t.Fatalf("missing key: %+v, %v; want not found, revision 0", v, err)
	}
	val := bytes.Repeat([]byte("x"), 64<<10)
	for i := range 200 {
		copy(val, strings.Repeat(string(rune('a'+i%26)), 8))
		val[8] = byte(i)
		rev, err := kv.Put(ctx, "site-a", val)
		if err != nil {
			t.Fatal(err)
		}
		v, err := jet.Latest(ctx, rjs, jet.SnapshotBucket, "site-a")
		if err != nil {
			t.Fatal(err)
		}
		if !v.Found || v.Revision != rev || !bytes.Equal(v.Data, val) {
			t.Fatalf("write %d: read revision %d found %v, want revision %d and the value written", i, v.Revision, v.Found, rev)
		}
	}
	if err := kv.Delete(ctx, "site-a"); err != nil {
		t.Fatal(err)
	}
	v, err = jet.Latest(ctx, rjs, jet.SnapshotBucket, "site-a")
	if err != nil || v.Found || v.Revision == 0 {
		t.Fatalf("deleted key: %+v, %v; want not found with the marker's revision", v, err)
	}
}
