package worker

import (
	"context"
	"errors"
	"fmt"
	"math"
	"sync"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"
	"go.uber.org/zap"

	"github.com/plumb-forecast/plumb/stream/jet"
	"github.com/plumb-forecast/plumb/stream/lease"
)

// DurableOptions configures ServeDurable. Zero fields take the documented
// defaults.
type DurableOptions struct {
	// Layout of the streams and buckets (jet.Layout; zero: its defaults).
	Layout jet.Layout
	// WorkerID names this worker in the lease bucket; it must be unique
	// among the workers sharing the inputs (required).
	WorkerID string
	// SnapshotInterval: every site that applied inputs since its last
	// snapshot is snapshot at least this often (wall time), besides every
	// PoolOptions.SnapshotEvery inputs; 0 means 1 minute, negative never.
	// A quiet site's snapshot then keeps up, so a restart replays little.
	SnapshotInterval time.Duration
	// Logger; nil means no logging.
	Logger *zap.Logger
	// Metrics, as given to the pool; nil means unregistered metrics.
	Metrics *Metrics
}

// ServeDurable feeds the pool from the input stream (JetStream) until ctx
// is cancelled. It takes leases on input partitions (package lease); for
// each partition gained it restores the partition's sites from their
// latest snapshots, then consumes the partition from one past the lowest
// sequence those snapshots cover, each site skipping what its snapshot
// already holds. The pool's periodic snapshots (PoolOptions.OnSnapshot
// must be DurableSnapshots' hook: see NewDurableSnapshots) are written to
// the snapshot bucket. A partition lost, and a graceful stop, stop its
// consumer, snapshot its sites and only then let the lease go, so the next
// owner resumes exactly where this one stopped. ready, if not nil, is
// closed once the layout exists and the lease manager runs.
func ServeDurable(ctx context.Context, nc *nats.Conn, p *Pool, snaps *DurableSnapshots, o DurableOptions, ready chan<- struct{}) error {
	if o.WorkerID == "" {
		return errors.New("worker: durable mode needs a worker id")
	}
	if o.Logger == nil {
		o.Logger = zap.NewNop()
	}
	if o.Metrics == nil {
		o.Metrics = p.m
	}
	js, err := jetstream.New(nc)
	if err != nil {
		return fmt.Errorf("worker: jetstream: %w", err)
	}
	if err := jet.Ensure(ctx, js, o.Layout); err != nil {
		return fmt.Errorf("worker: %w", err)
	}
	parts := o.Layout.Partitions
	if parts <= 0 {
		parts = jet.DefaultPartitions
	}
	pt, err := jet.NewPartitioner(parts)
	if err != nil {
		return fmt.Errorf("worker: %w", err)
	}
	snapKV, err := js.KeyValue(ctx, jet.SnapshotBucket)
	if err != nil {
		return fmt.Errorf("worker: snapshot bucket: %w", err)
	}
	leaseKV, err := js.KeyValue(ctx, jet.LeaseBucket)
	if err != nil {
		return fmt.Errorf("worker: lease bucket: %w", err)
	}
	d := &durable{
		js: js, pool: p, kv: snapKV, snaps: snaps, log: o.Logger, m: o.Metrics,
		sitesOf: make([][]string, parts), running: map[int]*partRun{},
	}
	for _, site := range p.Sites() {
		part, err := pt.Of(site)
		if err != nil {
			return fmt.Errorf("worker: %w", err)
		}
		d.sitesOf[part] = append(d.sitesOf[part], site)
	}
	snaps.start(snapKV, o.Logger, o.Metrics)

	poolCtx, stopPool := context.WithCancel(context.Background())
	poolDone := make(chan error, 1)
	go func() { poolDone <- p.Run(poolCtx) }()

	mgr, err := lease.New(leaseKV, o.WorkerID, parts, lease.Options{
		OnGained: d.gained, OnLost: d.lost, Logger: o.Logger,
	})
	if err != nil {
		stopPool()
		<-poolDone
		snaps.stop()
		return fmt.Errorf("worker: %w", err)
	}
	leaseCtx, stopLeases := context.WithCancel(context.Background())
	leaseDone := make(chan error, 1)
	go func() { leaseDone <- mgr.Run(leaseCtx) }()
	if ready != nil {
		close(ready)
	}
	if o.SnapshotInterval == 0 {
		o.SnapshotInterval = time.Minute
	}
	if o.SnapshotInterval > 0 {
		t := time.NewTicker(o.SnapshotInterval)
	loop:
		for {
			select {
			case <-ctx.Done():
				break loop
			case <-t.C:
				d.snapshotOwned(ctx)
			}
		}
		t.Stop()
	}

	<-ctx.Done()
	// Graceful stop: stop consuming, snapshot every site owned, write the
	// snapshots, then release the leases (Run releases on cancel) and
	// stop the pool.
	d.stopAll()
	snaps.stop()
	stopLeases()
	lerr := <-leaseDone
	stopPool()
	perr := <-poolDone
	o.Metrics.PartitionsOwned.Set(0)
	if lerr != nil && !errors.Is(lerr, context.Canceled) {
		return fmt.Errorf("worker: leases: %w", lerr)
	}
	if ferr := nc.Flush(); perr == nil && ferr != nil && nc.IsConnected() {
		perr = fmt.Errorf("worker: flush outputs: %w", ferr)
	}
	return perr
}

// durable is ServeDurable's state.
type durable struct {
	js    jetstream.JetStream
	pool  *Pool
	kv    jetstream.KeyValue
	snaps *DurableSnapshots
	log   *zap.Logger
	m     *Metrics

	sitesOf [][]string // by partition

	mu      sync.Mutex
	running map[int]*partRun
}

// partRun is one partition being consumed.
type partRun struct {
	cancel context.CancelFunc
	done   chan struct{}
}

// gained starts consuming partition part (called by the lease manager).
func (d *durable) gained(part int) {
	ctx, cancel := context.WithCancel(context.Background())
	r := &partRun{cancel: cancel, done: make(chan struct{})}
	d.mu.Lock()
	d.running[part] = r
	d.m.PartitionsOwned.Set(float64(len(d.running)))
	d.mu.Unlock()
	go func() {
		defer close(r.done)
		d.consume(ctx, part)
	}()
}

// lost stops consuming partition part and snapshots its sites before the
// lease manager lets the lease go.
func (d *durable) lost(part int) {
	d.mu.Lock()
	r := d.running[part]
	delete(d.running, part)
	d.m.PartitionsOwned.Set(float64(len(d.running)))
	d.mu.Unlock()
	if r == nil {
		return
	}
	d.stop(part, r)
}

// snapshotOwned snapshots every site of the partitions held that applied
// inputs since its last snapshot, through the writer's queue.
func (d *durable) snapshotOwned(ctx context.Context) {
	d.mu.Lock()
	var sites []string
	for part := range d.running {
		sites = append(sites, d.sitesOf[part]...)
	}
	d.mu.Unlock()
	for _, site := range sites {
		data, seq, err := d.pool.SnapshotIfChanged(ctx, site)
		if err != nil {
			if ctx.Err() == nil {
				d.log.Warn("timed snapshot", zap.String("site", site), zap.Error(err))
			}
			continue
		}
		if data != nil {
			d.snaps.Hook(site, seq, data)
		}
	}
}

// stopAll stops every partition, as lost does.
func (d *durable) stopAll() {
	d.mu.Lock()
	runs := d.running
	d.running = map[int]*partRun{}
	d.mu.Unlock()
	var wg sync.WaitGroup
	for part, r := range runs {
		wg.Add(1)
		go func() {
			defer wg.Done()
			d.stop(part, r)
		}()
	}
	wg.Wait()
}

// stop ends a partition's consumer, then snapshots and writes its sites.
func (d *durable) stop(part int, r *partRun) {
	r.cancel()
	<-r.done
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	for _, site := range d.sitesOf[part] {
		data, seq, err := d.pool.Snapshot(ctx, site)
		if err != nil {
			d.log.Error("final snapshot", zap.String("site", site), zap.Error(err))
			continue
		}
		if err := d.snaps.sync(ctx, site, seq, data); err != nil {
			d.log.Error("write final snapshot", zap.String("site", site), zap.Error(err))
		}
	}
}

// consume restores partition part's sites and applies its inputs until
// ctx ends, riding through errors (a server restart) with a back-off.
func (d *durable) consume(ctx context.Context, part int) {
	start, err := d.restore(ctx, part)
	for err != nil {
		if ctx.Err() != nil {
			return
		}
		d.log.Warn("restore partition", zap.Int("partition", part), zap.Error(err))
		if !sleepCtx(ctx, time.Second) {
			return
		}
		start, err = d.restore(ctx, part)
	}
	d.log.Info("partition gained", zap.Int("partition", part), zap.Int("sites", len(d.sitesOf[part])), zap.Uint64("from_seq", start))
	backoff := 100 * time.Millisecond
	for ctx.Err() == nil {
		next, err := d.consumeFrom(ctx, part, start)
		if next > start {
			start, backoff = next, 100*time.Millisecond
		}
		if ctx.Err() != nil {
			return
		}
		d.log.Warn("partition consumer stopped; resuming", zap.Int("partition", part), zap.Uint64("from_seq", start), zap.Error(err))
		if !sleepCtx(ctx, backoff) {
			return
		}
		backoff = min(2*backoff, 5*time.Second)
	}
}

// restore loads the snapshots of a partition's sites into the pool and
// returns the sequence to consume from: one past the lowest covered.
func (d *durable) restore(ctx context.Context, part int) (uint64, error) {
	low := uint64(math.MaxUint64)
	for _, site := range d.sitesOf[part] {
		var data []byte
		e, err := d.kv.Get(ctx, site)
		switch {
		case errors.Is(err, jetstream.ErrKeyNotFound):
		case err != nil:
			return 0, fmt.Errorf("snapshot of %s: %w", site, err)
		default:
			data = e.Value()
		}
		seq, err := d.pool.Restore(ctx, site, data)
		if err != nil {
			// A snapshot that cannot be read is not misread: the site
			// starts afresh from what the stream still holds.
			d.log.Error("snapshot refused; the site starts afresh", zap.String("site", site), zap.Error(err))
			if seq, err = d.pool.Restore(ctx, site, nil); err != nil {
				return 0, err
			}
		}
		low = min(low, seq)
	}
	if low == math.MaxUint64 {
		low = 0 // no site in this partition: read from the start, rejecting
	}
	return low + 1, nil
}

// consumeFrom reads the partition from sequence start until ctx ends or
// the consumer fails; it returns the sequence after the last one
// submitted.
func (d *durable) consumeFrom(ctx context.Context, part int, start uint64) (uint64, error) {
	cons, err := jet.PartitionConsumer(ctx, d.js, part, jet.ConsumerOptions{StartSeq: start})
	if err != nil {
		return start, err
	}
	it, err := cons.Messages()
	if err != nil {
		return start, err
	}
	stopped := make(chan struct{})
	defer close(stopped)
	go func() {
		select {
		case <-ctx.Done():
		case <-stopped:
		}
		it.Stop()
	}()
	next := start
	for {
		msg, err := it.Next()
		if err != nil {
			return next, err
		}
		meta, err := msg.Metadata()
		if err != nil {
			_ = msg.Term()
			continue
		}
		subject, _, err := jet.InputSubject(msg.Subject())
		if err != nil {
			_ = msg.Term()
			continue
		}
		seq := meta.Sequence.Stream
		if err := d.pool.SubmitSeq(subject, msg.Data(), seq, func() { _ = msg.Ack() }); err != nil {
			return next, err
		}
		next = seq + 1
	}
}

func sleepCtx(ctx context.Context, d time.Duration) bool {
	t := time.NewTimer(d)
	defer t.Stop()
	select {
	case <-t.C:
		return true
	case <-ctx.Done():
		return false
	}
}

// DurableSnapshots writes the pool's periodic snapshots to the snapshot
// bucket from one goroutine, through a bounded queue. Make it before the
// pool, give its Hook to PoolOptions.OnSnapshot, and the same value to
// ServeDurable.
type DurableSnapshots struct {
	q    chan snapJob
	done chan struct{}
	kv   jetstream.KeyValue
	log  *zap.Logger
	m    *Metrics
	once sync.Once
}

type snapJob struct {
	site string
	seq  uint64
	data []byte
	done chan error // if not nil, gets the write's outcome
}

// NewDurableSnapshots returns a snapshot writer with a queue of n (0 means
// 256).
func NewDurableSnapshots(n int) *DurableSnapshots {
	if n <= 0 {
		n = 256
	}
	return &DurableSnapshots{q: make(chan snapJob, n), done: make(chan struct{})}
}

// Hook is the PoolOptions.OnSnapshot function: it queues the snapshot,
// waiting for room.
func (s *DurableSnapshots) Hook(site string, seq uint64, data []byte) {
	s.q <- snapJob{site: site, seq: seq, data: data}
}

// sync queues a snapshot behind those already queued (so no older one of
// the site can overwrite it) and waits until it is written.
func (s *DurableSnapshots) sync(ctx context.Context, site string, seq uint64, data []byte) error {
	done := make(chan error, 1)
	select {
	case s.q <- snapJob{site: site, seq: seq, data: data, done: done}:
	case <-ctx.Done():
		return ctx.Err()
	}
	select {
	case err := <-done:
		return err
	case <-ctx.Done():
		return ctx.Err()
	}
}

func (s *DurableSnapshots) start(kv jetstream.KeyValue, log *zap.Logger, m *Metrics) {
	s.kv, s.log, s.m = kv, log, m
	go func() {
		defer close(s.done)
		for j := range s.q {
			ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
			err := s.write(ctx, j.site, j.seq, j.data)
			if err != nil {
				s.log.Error("write snapshot", zap.String("site", j.site), zap.Error(err))
			}
			if j.done != nil {
				j.done <- err
			}
			cancel()
		}
	}()
}

// stop writes what is queued and ends the writer.
func (s *DurableSnapshots) stop() {
	s.once.Do(func() {
		close(s.q)
		if s.kv != nil {
			<-s.done
		}
	})
}

// write puts one snapshot in the bucket, retrying a few times.
func (s *DurableSnapshots) write(ctx context.Context, site string, seq uint64, data []byte) error {
	var err error
	for try := 0; try < 5; try++ {
		if _, err = s.kv.Put(ctx, site, data); err == nil {
			s.m.SnapshotBytes.Observe(float64(len(data)))
			return nil
		}
		if !sleepCtx(ctx, time.Duration(try+1)*200*time.Millisecond) {
			break
		}
	}
	return fmt.Errorf("snapshot of %s at sequence %d: %w", site, seq, err)
}
