package main

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"net"
	"os"
	"os/exec"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	"github.com/nats-io/nats.go/jetstream"

	"github.com/plumb-forecast/plumb/internal/sharedtest"
	"github.com/plumb-forecast/plumb/stream"
	"github.com/plumb-forecast/plumb/stream/history"
	"github.com/plumb-forecast/plumb/stream/jet"
	"github.com/plumb-forecast/plumb/stream/jet/jettest"
	"github.com/plumb-forecast/plumb/worker"
)

// buildPlumb builds the plumb binary once per test binary.
var buildPlumb = sync.OnceValues(func() (string, error) {
	dir, err := os.MkdirTemp("", "plumb-bin-")
	if err != nil {
		return "", err
	}
	bin := filepath.Join(dir, "plumb")
	out, err := exec.Command("go", "build", "-o", bin, ".").CombinedOutput()
	if err != nil {
		return "", fmt.Errorf("go build: %v\n%s", err, out)
	}
	return bin, nil
})

// faultRig is a NATS server (or cluster) whose input stream holds a
// replayed history, and the durable worker processes run against it.
type faultRig struct {
	t       *testing.T
	bin     string
	url     string
	js      jetstream.JetStream
	sites   string
	layout  jet.Layout
	total   uint64            // inputs in the stream
	last    map[string]uint64 // the sequence of each site's last input
	workers map[string]*exec.Cmd
	logs    map[string]*syncBuffer
}

// newFaultRig replays events into the input stream of the server(s) at url.
func newFaultRig(t *testing.T, bin, url, dir string, events []history.Event, layout jet.Layout) *faultRig {
	t.Helper()
	_, js := jettest.Connect(t, url)
	nc, err := stream.Connect(stream.ConnOptions{URL: url, Name: "replay"})
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(nc.Close)
	ctx := context.Background()
	if err := jet.Ensure(ctx, js, layout); err != nil {
		t.Fatal(err)
	}
	pjs, err := jetstream.New(nc)
	if err != nil {
		t.Fatal(err)
	}
	st, err := stream.Replay(ctx, nc, events, stream.ReplayOptions{Publisher: jet.NewReplayPublisher(pjs)})
	if err != nil {
		t.Fatal(err)
	}
	r := &faultRig{t: t, bin: bin, url: url, js: js, sites: filepath.Join(dir, "sites.json"), layout: layout,
		total: uint64(st.Runs + st.Readings), workers: map[string]*exec.Cmd{}, logs: map[string]*syncBuffer{},
		last: map[string]uint64{}}
	in, err := js.Stream(ctx, jet.InputStream)
	if err != nil {
		t.Fatal(err)
	}
	for _, ev := range events {
		site := ev.Site()
		if _, ok := r.last[site]; ok {
			continue
		}
		m, err := in.GetLastMsgForSubject(ctx, "plumb.in.*.*."+site)
		if err != nil {
			t.Fatalf("last input of %s: %v", site, err)
		}
		r.last[site] = m.Sequence
	}
	t.Cleanup(func() {
		for _, c := range r.workers {
			c.Process.Kill()
			c.Wait()
		}
	})
	return r
}

// start runs a worker process named id.
func (r *faultRig) start(id string) {
	r.t.Helper()
	cmd := exec.Command(r.bin, "run", "--durable", "--nats", r.url, "--sites", r.sites,
		"--model", "baseline", "--worker-id", id, "--metrics", "",
		"--partitions", strconv.Itoa(r.layout.Partitions), "--replicas", strconv.Itoa(max(1, r.layout.Replicas)),
		"--lease-ttl", r.layout.LeaseTTL.String(), "--snapshot-every", "300", "--snapshot-interval", "1s", "--log-level", workerLogLevel())
	logs := &syncBuffer{}
	cmd.Stdout, cmd.Stderr = logs, logs
	if err := cmd.Start(); err != nil {
		r.t.Fatal(err)
	}
	r.workers[id], r.logs[id] = cmd, logs
}

// workerLogLevel is the workers' log level: warn, or PLUMB_TEST_WORKER_LOG
// (info or debug to see every lease and partition move when a fault test
// fails).
func workerLogLevel() string {
	if l := os.Getenv("PLUMB_TEST_WORKER_LOG"); l != "" {
		return l
	}
	return "warn"
}

// output returns what every worker printed.
func (r *faultRig) output() string {
	var b strings.Builder
	for id, l := range r.logs {
		fmt.Fprintf(&b, "--- %s\n%s", id, l.String())
	}
	return b.String()
}

// stop sends sig to worker id and waits for it to end.
func (r *faultRig) stop(id string, sig syscall.Signal) {
	r.t.Helper()
	cmd := r.workers[id]
	if err := cmd.Process.Signal(sig); err != nil {
		r.t.Fatal(err)
	}
	err := cmd.Wait()
	var ee *exec.ExitError
	if err != nil && !(sig == syscall.SIGKILL && errors.As(err, &ee)) {
		r.t.Fatalf("worker %s after %s: %v\n%s", id, sig, err, r.output())
	}
	delete(r.workers, id)
}

// covered returns, per site, the input-stream sequence its stored
// snapshot covers (0 without one).
func (r *faultRig) covered() map[string]uint64 {
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Second)
	defer cancel()
	out := map[string]uint64{}
	for site := range r.last {
		v, err := jet.Latest(ctx, r.js, jet.SnapshotBucket, site)
		if err != nil || !v.Found {
			continue
		}
		if seq, err := worker.SnapshotSeq(v.Data); err == nil {
			out[site] = seq
		}
	}
	return out
}

// progress returns how far through the stream the workers have come: the
// lowest sequence the sites' stored snapshots cover (partitions are read
// independently, and some run ahead).
func (r *faultRig) progress() uint64 {
	got := r.covered()
	n := uint64(math.MaxUint64)
	for site := range r.last {
		n = min(n, got[site])
	}
	return n
}

// done reports whether every site's stored snapshot covers the site's
// last input.
func (r *faultRig) done() bool {
	got := r.covered()
	for site, last := range r.last {
		if got[site] < last {
			return false
		}
	}
	return true
}

// owners returns the holder of each partition's lease ("" if none).
func (r *faultRig) owners() []string {
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Second)
	defer cancel()
	out := make([]string, r.layout.Partitions)
	kv, err := r.js.KeyValue(ctx, jet.LeaseBucket)
	if err != nil {
		return out
	}
	for p := range out {
		e, err := kv.Get(ctx, "lease."+strconv.Itoa(p))
		if err != nil {
			continue
		}
		var h struct{ Worker string }
		if json.Unmarshal(e.Value(), &h) == nil {
			out[p] = h.Worker
		}
	}
	return out
}

// waitFor polls cond until it holds or d passes; a worker that exits on
// its own fails the test.
func (r *faultRig) waitFor(what string, d time.Duration, cond func() bool) {
	r.t.Helper()
	deadline := time.Now().Add(d)
	for !cond() {
		if time.Now().After(deadline) {
			r.t.Fatalf("%s: not after %s; workers' output:\n%s", what, d, r.output())
		}
		for id, c := range r.workers {
			if c.ProcessState != nil {
				r.t.Fatalf("%s: worker %s exited; output:\n%s", what, id, r.output())
			}
		}
		time.Sleep(50 * time.Millisecond)
	}
}

// finalState returns every snapshot and every site's latest bundle.
func (r *faultRig) finalState() map[string][]byte {
	r.t.Helper()
	ctx := context.Background()
	kv, err := r.js.KeyValue(ctx, jet.SnapshotBucket)
	if err != nil {
		r.t.Fatal(err)
	}
	keys, err := kv.Keys(ctx)
	if err != nil {
		r.t.Fatal(err)
	}
	s, err := r.js.Stream(ctx, jet.BundleStream)
	if err != nil {
		r.t.Fatal(err)
	}
	out := map[string][]byte{}
	for _, k := range keys {
		e, err := kv.Get(ctx, k)
		if err != nil {
			r.t.Fatal(err)
		}
		out["snapshot "+k] = e.Value()
		m, err := s.GetLastMsgForSubject(ctx, stream.QuantilesSubject(k))
		if err != nil {
			r.t.Fatalf("last bundle of %s: %v", k, err)
		}
		out["bundle "+k] = m.Data
	}
	return out
}

// same compares a final state with the uninterrupted run's.
func same(t *testing.T, got, want map[string][]byte) bool {
	t.Helper()
	ok := true
	for k, w := range want {
		if !bytes.Equal(got[k], w) {
			t.Errorf("%s differs from the uninterrupted run's (%d bytes, want %d)", k, len(got[k]), len(w))
			ok = false
		}
	}
	if len(got) != len(want) {
		t.Errorf("%d snapshots and bundles, want %d", len(got), len(want))
		ok = false
	}
	return ok
}

// TestDurableFaults replays GEFCom2012 wind (four farms, three years,
// about 84 000 inputs) into the input stream and runs durable workers
// (`plumb run --durable`, as processes) over it: once without
// interruption, then under faults. Each time the final snapshot of every
// site (forecaster, calibrators, monitors, pending forecasts, the stream
// sequence covered) and the latest bundle of every site must be
// byte-identical to the uninterrupted run's: nothing lost, nothing counted
// twice.
func TestDurableFaults(t *testing.T) {
	if testing.Short() {
		t.Skip("runs worker processes over three years of data")
	}
	dir := sharedtest.Data(t, "gefcom2012-wind")
	bin, err := buildPlumb()
	if err != nil {
		t.Fatal(err)
	}
	h, err := history.Load(dir, history.LoadOptions{})
	if err != nil {
		t.Fatal(err)
	}
	events := h.Events()
	layout := jet.Layout{Partitions: 4, LeaseTTL: 2 * time.Second}

	clean := newFaultRig(t, bin, jettest.Server(t), dir, events, layout)
	clean.start("w1")
	clean.waitFor("uninterrupted run done", 5*time.Minute, clean.done)
	clean.stop("w1", syscall.SIGTERM)
	want := clean.finalState()
	if len(want) != 2*len(h.Sites) {
		t.Fatalf("the uninterrupted run left %d snapshots and bundles, want %d", len(want), 2*len(h.Sites))
	}

	// Ten SIGKILLs at spread points of the replay, and three moments
	// after a start, each followed by a restart of the same worker.
	t.Run("sigkill", func(t *testing.T) {
		r := newFaultRig(t, bin, jettest.Server(t), dir, events, layout)
		rng := rand.New(rand.NewPCG(7, 11))
		var points []string
		for k := 1; k <= 10; k++ {
			if k%3 == 0 {
				// Also a kill moments after a start, before the restored
				// partitions write a snapshot: the next start restores the
				// same snapshots again and must replay what the killed
				// run consumed and acknowledged.
				r.start("w1")
				time.Sleep(time.Duration(300+rng.IntN(1500)) * time.Millisecond)
				r.stop("w1", syscall.SIGKILL)
				points = append(points, "early")
			}
			r.start("w1")
			at := r.total*uint64(k)/11 + uint64(rng.IntN(int(r.total/40)))
			r.waitFor(fmt.Sprintf("kill point %d", k), 3*time.Minute, func() bool { return r.progress() >= at || r.done() })
			points = append(points, strconv.FormatUint(r.progress(), 10))
			r.stop("w1", syscall.SIGKILL)
		}
		r.start("w1")
		r.waitFor("run done", 5*time.Minute, r.done)
		// The last kill can come after every snapshot is written (a
		// site's last input before the kill point), and then the run is
		// done at once: wait for the worker to hold its leases, so that
		// SIGTERM does not come before it listens for it.
		r.waitFor("w1 holds its leases", time.Minute, func() bool { return slices.Contains(r.owners(), "w1") })
		r.stop("w1", syscall.SIGTERM)
		t.Logf("killed with SIGKILL at stream sequences %s of %d, restarted each time", strings.Join(points, ", "), r.total)
		same(t, r.finalState(), want)
	})

	// The NATS server stops mid-replay and starts again on the same port
	// and store: the worker rides through without being touched.
	t.Run("server restart", func(t *testing.T) {
		l, err := net.Listen("tcp", "127.0.0.1:0")
		if err != nil {
			t.Fatal(err)
		}
		port := l.Addr().(*net.TCPAddr).Port
		l.Close()
		store := t.TempDir()
		emb, err := stream.StartEmbedded(stream.EmbeddedOptions{Port: port, StoreDir: store})
		if err != nil {
			t.Fatal(err)
		}
		defer func() { emb.Shutdown() }()
		r := newFaultRig(t, bin, emb.URL(), dir, events, layout)
		r.start("w1")
		r.waitFor("a third of the stream", 3*time.Minute, func() bool { return r.progress() >= r.total/3 })
		at := r.progress()
		emb.Shutdown()
		time.Sleep(time.Second)
		if emb, err = stream.StartEmbedded(stream.EmbeddedOptions{Port: port, StoreDir: store}); err != nil {
			t.Fatal(err)
		}
		r.waitFor("run done after the server restart", 5*time.Minute, r.done)
		r.stop("w1", syscall.SIGTERM)
		t.Logf("server restarted at stream sequence %d of %d; the worker resumed on its own", at, r.total)
		same(t, r.finalState(), want)
	})

	// A 3-server JetStream cluster on loopback and three workers; one is
	// killed, its partitions must move within 15 s; a fourth joins and
	// must take a share.
	t.Run("cluster", func(t *testing.T) {
		cl := layout
		cl.Replicas = 3
		cl.Partitions = 6 // each of three workers aims at ceil(6/3) = 2
		r := newFaultRig(t, bin, strings.Join(jettest.Cluster(t, 3), ","), dir, events, cl)
		for _, id := range []string{"w1", "w2", "w3"} {
			r.start(id)
		}
		spread := func(ids ...string) func() bool {
			return func() bool {
				held := map[string]int{}
				for _, o := range r.owners() {
					if o == "" {
						return false
					}
					held[o]++
				}
				for _, id := range ids {
					if held[id] == 0 {
						return false
					}
				}
				return len(held) == len(ids)
			}
		}
		r.waitFor("partitions spread over three workers", time.Minute, spread("w1", "w2", "w3"))
		r.waitFor("a quarter of the stream", 3*time.Minute, func() bool { return r.progress() >= r.total/4 })
		before := r.owners()
		r.stop("w2", syscall.SIGKILL)
		killed := time.Now()
		r.waitFor("w2's partitions taken over", 30*time.Second, spread("w1", "w3"))
		moved := time.Since(killed)
		t.Logf("leases before the kill %v, after %v: moved in %s", before, r.owners(), moved.Round(10*time.Millisecond))
		if moved > 15*time.Second {
			t.Errorf("partitions of the killed worker moved after %s, want within 15 s", moved)
		}
		r.start("w4")
		r.waitFor("w4 takes a share", time.Minute, spread("w1", "w3", "w4"))
		t.Logf("after w4 joined: %v", r.owners())
		r.waitFor("run done", 5*time.Minute, r.done)
		for _, id := range []string{"w1", "w3", "w4"} {
			r.stop(id, syscall.SIGTERM)
		}
		if !same(t, r.finalState(), want) {
			t.Logf("workers' output:\n%s", r.output())
		}
	})
}

// TestReplayDurableTwiceStoresOnce: a replay published twice with message
// ids (plumb replay --durable) stores every input once.
func TestReplayDurableTwiceStoresOnce(t *testing.T) {
	url := jettest.Server(t)
	_, js := jettest.Connect(t, url)
	ctx := context.Background()
	if err := jet.Ensure(ctx, js, jet.Layout{}); err != nil {
		t.Fatal(err)
	}
	var out strings.Builder
	for range 2 {
		code, o, e := run(t, "replay", "--durable", "--nats", url, "--data", "../../testdata/demo", "--quiet", "--to", "2026-03-03")
		if code != 0 {
			t.Fatalf("replay exit %d\n%s", code, e)
		}
		out.WriteString(o)
	}
	s, err := js.Stream(ctx, jet.InputStream)
	if err != nil {
		t.Fatal(err)
	}
	info, err := s.Info(ctx)
	if err != nil {
		t.Fatal(err)
	}
	var published int
	for _, line := range strings.Split(out.String(), "\n") {
		var runs, readings, gaps int
		if _, err := fmt.Sscanf(line, "published %d weather runs and %d readings (%d gaps", &runs, &readings, &gaps); err == nil {
			published = runs + readings
		}
	}
	if published == 0 || info.State.Msgs != uint64(published) {
		t.Fatalf("stream holds %d messages after two replays of %d inputs\n%s", info.State.Msgs, published, out.String())
	}
}
