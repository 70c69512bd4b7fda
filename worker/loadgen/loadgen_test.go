package loadgen

import (
	"context"
	"testing"
	"time"

	"github.com/plumb-forecast/plumb/stream"
	"github.com/plumb-forecast/plumb/worker"
)

func startWorker(t *testing.T, sites int, serve bool) (*worker.Pool, string) {
	t.Helper()
	emb, err := stream.StartEmbedded(stream.EmbeddedOptions{Port: -1, StoreDir: t.TempDir()})
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(emb.Shutdown)
	wnc, err := stream.Connect(stream.ConnOptions{URL: emb.URL()})
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(wnc.Close)
	pool, err := worker.NewPool(Sites(sites, 1), worker.Config{}, worker.NewNATSOutput(wnc), worker.PoolOptions{})
	if err != nil {
		t.Fatal(err)
	}
	if serve {
		ctx, cancel := context.WithCancel(context.Background())
		ready, done := make(chan struct{}), make(chan error, 1)
		go func() { done <- worker.Serve(ctx, wnc, pool, ready) }()
		<-ready
		t.Cleanup(func() { cancel(); <-done })
	}
	return pool, emb.URL()
}

// TestRun loads a worker with 20 invented sites for two seconds at 6000x
// and checks that the readings went out at the planned rate, that bundles
// came back and that latencies were measured.
func TestRun(t *testing.T) {
	pool, url := startWorker(t, 20, true)
	pub, err := stream.Connect(stream.ConnOptions{URL: url})
	if err != nil {
		t.Fatal(err)
	}
	defer pub.Close()
	r, err := Run(context.Background(), pub, pub, Options{Sites: 20, Speed: 6000, Duration: 2 * time.Second, Warmup: 500 * time.Millisecond})
	if err != nil {
		t.Fatal(err)
	}
	// 2 s at 6000x is 200 minutes: 13 or 14 quarter-hours for 20 sites.
	if r.Readings < 13*20 || r.Readings > 14*20 {
		t.Fatalf("%d readings, want 260 to 280", r.Readings)
	}
	if r.Bundles == 0 || r.LatencyN == 0 || !(r.LatencyP50Ms > 0) || r.LatencyP99Ms < r.LatencyP50Ms || r.LatencyMaxMs < r.LatencyP99Ms {
		t.Fatalf("result %+v", r)
	}
	if _, m := pool.Applied(); m != r.Readings {
		t.Fatalf("worker applied %d readings, %d published", m, r.Readings)
	}
}

// TestCatchUp: a backlog published before the pool runs is applied in full.
func TestCatchUp(t *testing.T) {
	pool, url := startWorker(t, 50, false)
	nc, err := stream.Connect(stream.ConnOptions{URL: url})
	if err != nil {
		t.Fatal(err)
	}
	defer nc.Close()
	r, err := CatchUp(context.Background(), nc, pool, Options{Sites: 50}, 3000)
	if err != nil {
		t.Fatal(err)
	}
	if _, m := pool.Applied(); m != 3000 || r.Backlog != 3000 || !(r.DrainS > 0) || !(r.ReadingsPer > 0) {
		t.Fatalf("applied %d, result %+v", m, r)
	}
}
