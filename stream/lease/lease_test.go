package lease_test

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"slices"
	"sync"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"

	"github.com/plumb-forecast/plumb/stream/jet"
	"github.com/plumb-forecast/plumb/stream/jet/jettest"
	"github.com/plumb-forecast/plumb/stream/lease"
)

// testTTL is the lease TTL of the tests: short, so that expiry takes seconds.
const testTTL = 2 * time.Second

const partitions = 16

// ledger records the events of every worker of a test and checks, at every
// event, that no partition has two owners.
type ledger struct {
	t     *testing.T
	mu    sync.Mutex
	owner map[int]string
}

func newLedger(t *testing.T) *ledger { return &ledger{t: t, owner: map[int]string{}} }

func (l *ledger) gained(w string, p int) {
	l.mu.Lock()
	defer l.mu.Unlock()
	if o, ok := l.owner[p]; ok {
		l.t.Errorf("partition %d gained by %s while %s owns it", p, w, o)
	}
	l.owner[p] = w
}

func (l *ledger) lost(w string, p int) {
	l.mu.Lock()
	defer l.mu.Unlock()
	if o := l.owner[p]; o != w {
		l.t.Errorf("partition %d lost by %s, owned by %q", p, w, o)
	}
	delete(l.owner, p)
}

// counts returns how many partitions each worker owns, as the events say.
func (l *ledger) counts() map[string]int {
	l.mu.Lock()
	defer l.mu.Unlock()
	c := map[string]int{}
	for _, w := range l.owner {
		c[w]++
	}
	return c
}

func (l *ledger) ownedBy(w string) []int {
	l.mu.Lock()
	defer l.mu.Unlock()
	var ps []int
	for p, o := range l.owner {
		if o == w {
			ps = append(ps, p)
		}
	}
	slices.Sort(ps)
	return ps
}

// worker is one lease manager with its own connection.
type worker struct {
	name   string
	nc     *nats.Conn
	m      *lease.Manager
	cancel context.CancelFunc
	done   chan error
}

func startWorker(t *testing.T, url, name string, led *ledger) *worker {
	t.Helper()
	nc, js := jettest.Connect(t, url)
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	kv, err := js.KeyValue(ctx, jet.LeaseBucket)
	if err != nil {
		t.Fatal(err)
	}
	m, err := lease.New(kv, name, partitions, lease.Options{
		OnGained: func(p int) { led.gained(name, p) },
		OnLost:   func(p int) { led.lost(name, p) },
	})
	if err != nil {
		t.Fatal(err)
	}
	rctx, rcancel := context.WithCancel(context.Background())
	w := &worker{name: name, nc: nc, m: m, cancel: rcancel, done: make(chan error, 1)}
	go func() { w.done <- m.Run(rctx) }()
	t.Cleanup(func() { w.stop(t) })
	return w
}

// stop cancels the worker and waits for Run to return; it is safe to call
// twice.
func (w *worker) stop(t *testing.T) error {
	t.Helper()
	w.cancel()
	select {
	case err, ok := <-w.done:
		if ok {
			close(w.done)
		}
		return err
	case <-time.After(10 * time.Second):
		t.Fatalf("worker %s: Run did not return", w.name)
	}
	return nil
}

// waitFor polls cond until it holds or the timeout passes.
func waitFor(t *testing.T, timeout time.Duration, what string, cond func() bool) time.Duration {
	t.Helper()
	start := time.Now()
	for !cond() {
		if time.Since(start) > timeout {
			t.Fatalf("after %v: %s", timeout, what)
		}
		time.Sleep(20 * time.Millisecond)
	}
	return time.Since(start)
}

// split reports whether the named workers own every partition between them,
// none more than ceil(16/len(names)), and nobody else owns any.
func split(led *ledger, names ...string) func() bool {
	return func() bool {
		c := led.counts()
		aim := (partitions + len(names) - 1) / len(names)
		total := 0
		for _, n := range names {
			if c[n] > aim || c[n] == 0 {
				return false
			}
			total += c[n]
		}
		return total == partitions && len(c) == len(names)
	}
}

func setup(t *testing.T, url string, replicas int) jetstream.KeyValue {
	t.Helper()
	_, js := jettest.Connect(t, url)
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	if err := jet.Ensure(ctx, js, jet.Layout{Replicas: replicas, LeaseTTL: testTTL}); err != nil {
		t.Fatal(err)
	}
	kv, err := js.KeyValue(ctx, jet.LeaseBucket)
	if err != nil {
		t.Fatal(err)
	}
	return kv
}

func TestSingleWorkerOwnsAll(t *testing.T) {
	url := jettest.Server(t)
	kv := setup(t, url, 1)
	led := newLedger(t)
	w := startWorker(t, url, "solo", led)
	waitFor(t, 5*time.Second, "solo owns all", split(led, "solo"))
	if got := w.m.Owned(); len(got) != partitions {
		t.Errorf("Owned() = %v", got)
	}
	// It keeps them past several TTLs: renewals work.
	time.Sleep(2 * testTTL)
	if got := led.ownedBy("solo"); len(got) != partitions {
		t.Errorf("after %v solo owns %v", 2*testTTL, got)
	}
	if err := w.stop(t); err != nil {
		t.Errorf("Run: %v", err)
	}
	if got := led.counts(); len(got) != 0 {
		t.Errorf("after stop the events leave %v owned", got)
	}
	if got := w.m.Owned(); len(got) != 0 {
		t.Errorf("after stop Owned() = %v", got)
	}
	// Released at once: every key is gone, leases and heartbeat.
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Second)
	defer cancel()
	if keys, err := kv.Keys(ctx); !errors.Is(err, jetstream.ErrNoKeysFound) {
		t.Errorf("after stop the bucket holds %v (%v)", keys, err)
	}
}

// TestLostRevision overwrites a lease behind its holder's back: the holder's
// next renewal finds another revision and loses the partition.
func TestLostRevision(t *testing.T) {
	url := jettest.Server(t)
	kv := setup(t, url, 1)
	led := newLedger(t)
	startWorker(t, url, "holder", led)
	waitFor(t, 5*time.Second, "holder owns all", split(led, "holder"))
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Second)
	defer cancel()
	if _, err := kv.Put(ctx, "lease.5", []byte(`{"worker":"intruder"}`)); err != nil {
		t.Fatal(err)
	}
	waitFor(t, testTTL, "holder loses partition 5", func() bool { return !slices.Contains(led.ownedBy("holder"), 5) })
	// Once the intruder's write expires, the holder takes it back.
	waitFor(t, 3*testTTL, "holder regains partition 5", func() bool { return slices.Contains(led.ownedBy("holder"), 5) })
}

// scenario runs workers through joining, an abrupt stop, a join and a
// graceful stop, checking at every event that no partition has two owners.
// urls are the servers the workers connect to, in turn.
func scenario(t *testing.T, urls []string, replicas int) {
	kv := setup(t, urls[0], replicas)
	led := newLedger(t)
	url := func(i int) string { return urls[i%len(urls)] }

	startWorker(t, url(0), "a", led)
	b := startWorker(t, url(1), "b", led)
	c := startWorker(t, url(2), "c", led)
	d := waitFor(t, 10*time.Second, "a, b and c split the partitions", split(led, "a", "b", "c"))
	t.Logf("three workers split 16 partitions in %v: %v", d, led.counts())

	// Abrupt stop: c's connection goes, so its renewals fail and nothing is
	// released. c must give its partitions up (its own deadline) before
	// the others can take them over (the server's expiry).
	cOwned := led.ownedBy("c")
	c.nc.Close()
	d = waitFor(t, 15*time.Second, "a and b take c's partitions over", split(led, "a", "b"))
	t.Logf("c's partitions %v taken over %v after its abrupt stop: %v", cOwned, d, led.counts())
	c.stop(t) // its heartbeat cannot be removed: an error is expected

	// A fourth worker joins and takes a share.
	startWorker(t, url(3), "e", led)
	d = waitFor(t, 10*time.Second, "e takes a share", split(led, "a", "b", "e"))
	t.Logf("e took a share in %v: %v", d, led.counts())

	// Graceful stop: b releases at once, leaving no lease behind.
	bOwned := led.ownedBy("b")
	if err := b.stop(t); err != nil {
		t.Errorf("b stopping: %v", err)
	}
	ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
	defer cancel()
	// Reads may be served by a replica that has not applied the release
	// yet (direct gets on an R3 bucket): look again for a moment, far
	// shorter than the lease TTL, before calling a lease still held.
	for _, p := range bOwned {
		for deadline := time.Now().Add(time.Second); ; time.Sleep(20 * time.Millisecond) {
			e, err := kv.Get(ctx, fmt.Sprintf("lease.%d", p))
			if errors.Is(err, jetstream.ErrKeyNotFound) || errors.Is(err, jetstream.ErrKeyDeleted) {
				break // released, not yet taken
			}
			if err != nil {
				t.Fatal(err)
			}
			var h struct{ Worker string }
			if err := json.Unmarshal(e.Value(), &h); err == nil && h.Worker != "b" {
				break
			}
			if time.Now().After(deadline) {
				t.Errorf("lease of partition %d holds %s a second after b's graceful stop", p, e.Value())
				break
			}
		}
	}
	d = waitFor(t, 10*time.Second, "a and e take b's partitions", split(led, "a", "e"))
	t.Logf("b's partitions %v taken %v after its graceful stop: %v", bOwned, d, led.counts())
}

func TestScenarioOneServer(t *testing.T) {
	url := jettest.Server(t)
	scenario(t, []string{url}, 1)
}

// TestScenarioCluster runs the scenario on a 3-server cluster with leases
// replicated on all three, workers spread over the servers.
func TestScenarioCluster(t *testing.T) {
	if testing.Short() {
		t.Skip("starts a 3-server JetStream cluster")
	}
	urls := jettest.Cluster(t, 3)
	scenario(t, urls, 3)
}

func TestNewInvalid(t *testing.T) {
	tests := []struct {
		name   string
		worker string
	}{
		{"empty", ""},
		{"dot", "a.b"},
		{"wildcard", "a*"},
		{"space", "a b"},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			if _, err := lease.New(nil, tt.worker, 4, lease.Options{}); !errors.Is(err, lease.ErrBadWorker) {
				t.Errorf("New(%q) error = %v, want ErrBadWorker", tt.worker, err)
			}
		})
	}
}

func TestRunNeedsTTL(t *testing.T) {
	_, js := jettest.Connect(t, jettest.Server(t))
	ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
	defer cancel()
	kv, err := js.CreateKeyValue(ctx, jetstream.KeyValueConfig{Bucket: "no_ttl"})
	if err != nil {
		t.Fatal(err)
	}
	m, err := lease.New(kv, "w", 4, lease.Options{})
	if err != nil {
		t.Fatal(err)
	}
	if err := m.Run(ctx); !errors.Is(err, lease.ErrBucketTTL) {
		t.Errorf("Run on a bucket without TTL: %v, want ErrBucketTTL", err)
	}
}
