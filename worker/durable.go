package worker

import (
	"context"
	"errors"
	"fmt"
	"math"
	"sync"
	"sync/atomic"
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
		js: js, pool: p, snaps: snaps, log: o.Logger, m: o.Metrics, workerID: o.WorkerID,
		sitesOf: make([][]string, parts), running: map[int]*partRun{},
	}
	for _, site := range p.Sites() {
		part, err := pt.Of(site)
		if err != nil {
			return fmt.Errorf("worker: %w", err)
		}
		d.sitesOf[part] = append(d.sitesOf[part], site)
	}
	snaps.start(js, snapKV, o.Logger, o.Metrics)

	poolCtx, stopPool := context.WithCancel(context.Background())
	poolDone := make(chan error, 1)
	go func() { poolDone <- p.Run(poolCtx) }()

	mgr, err := lease.New(leaseKV, o.WorkerID, parts, lease.Options{
		OnGained: d.gained, OnLost: d.lost, Logger: o.Logger,
	})
	if err == nil {
		d.holds = mgr.Holds
	}
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
	snaps *DurableSnapshots
	log   *zap.Logger
	m     *Metrics

	sitesOf   [][]string       // by partition
	holds     func(p int) bool // the lease manager's Holds
	workerID  string
	consumers atomic.Uint64 // consumers made: names each one

	mu      sync.Mutex
	running map[int]*partRun
	closing bool           // set by stopAll: no partition starts after it
	stops   sync.WaitGroup // partitions being stopped
}

// partRun is one partition being consumed.
type partRun struct {
	cancel context.CancelFunc
	done   chan struct{}
	// restored is set once the partition's sites hold their snapshots:
	// only then are they the partition's state, to be written back when
	// the partition goes.
	restored atomic.Bool
}

// gained starts consuming partition part (called by the lease manager).
func (d *durable) gained(part int) {
	ctx, cancel := context.WithCancel(context.Background())
	r := &partRun{cancel: cancel, done: make(chan struct{})}
	d.mu.Lock()
	if d.closing {
		// Gained while shutting down: the lease goes back untouched.
		d.mu.Unlock()
		cancel()
		return
	}
	d.running[part] = r
	d.m.PartitionsOwned.Set(float64(len(d.running)))
	d.mu.Unlock()
	go func() {
		defer close(r.done)
		d.consume(ctx, part, r)
	}()
}

// lost stops consuming partition part and snapshots its sites before the
// lease manager lets the lease go.
func (d *durable) lost(part int) {
	d.mu.Lock()
	r := d.running[part]
	delete(d.running, part)
	d.m.PartitionsOwned.Set(float64(len(d.running)))
	if r != nil {
		d.stops.Add(1)
	}
	d.mu.Unlock()
	if r == nil {
		return
	}
	defer d.stops.Done()
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

// stopAll stops every partition, as lost does, and waits until every
// partition being stopped (here or by lost) has written its snapshots; no
// partition starts afterwards.
func (d *durable) stopAll() {
	d.mu.Lock()
	runs := d.running
	d.running = map[int]*partRun{}
	d.closing = true
	d.stops.Add(len(runs))
	d.mu.Unlock()
	for part, r := range runs {
		go func() {
			defer d.stops.Done()
			d.stop(part, r)
		}()
	}
	d.stops.Wait()
}

// stop ends a partition's consumer, then snapshots and writes its sites.
// A partition lost before its sites were restored writes nothing: the
// pool's state of those sites is not the partition's (it is what this
// worker held when it last owned them, or nothing), and writing it would
// set the next owner back.
func (d *durable) stop(part int, r *partRun) {
	r.cancel()
	<-r.done
	if !r.restored.Load() {
		d.log.Info("partition lost before its restore ended: no snapshot written", zap.Int("partition", part))
		return
	}
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
func (d *durable) consume(ctx context.Context, part int, r *partRun) {
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
	if ctx.Err() != nil {
		return
	}
	r.restored.Store(true)
	d.log.Info("partition gained", zap.Int("partition", part), zap.Int("sites", len(d.sitesOf[part])), zap.Uint64("from_seq", start))
	backoff := 100 * time.Millisecond
	for ctx.Err() == nil {
		if !d.holds(part) {
			// The lease lapsed (this worker stalled): the manager is about
			// to drop it, or will renew it if no one took it. Wait.
			if !sleepCtx(ctx, backoff) {
				return
			}
			continue
		}
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
		// From the leader: the snapshot the previous owner wrote just
		// before letting the lease go must be the one restored.
		v, err := jet.Latest(ctx, d.js, jet.SnapshotBucket, site)
		if err != nil {
			return 0, fmt.Errorf("snapshot of %s: %w", site, err)
		}
		var data []byte
		if v.Found {
			data = v.Data
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
	// A consumer of this worker's alone, made for this read and deleted
	// after it: no other process can take its deliveries.
	owner := fmt.Sprintf("%s-%d", d.workerID, d.consumers.Add(1))
	cons, err := jet.PartitionConsumer(ctx, d.js, part, jet.ConsumerOptions{StartSeq: start, Owner: owner})
	if err != nil {
		return start, err
	}
	defer func() {
		// Best effort: a consumer left behind (the server unreachable)
		// is deleted by the server once inactive.
		dctx, cancel := context.WithTimeout(context.Background(), 2*time.Second)
		defer cancel()
		_ = d.js.DeleteConsumer(dctx, jet.InputStream, cons.CachedInfo().Name)
	}()
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
	var delivered uint64 // the consumer sequence of the last delivery
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
		// The consumer numbers its deliveries 1, 2, 3... (redeliveries
		// included); a gap would mean that another process pulled from it.
		// The inputs past a gap are not applied: the consumer is made
		// again from the first one this worker did not get.
		if meta.Sequence.Consumer != delivered+1 {
			return next, fmt.Errorf("%w: delivery %d after %d", errDeliveryGap, meta.Sequence.Consumer, delivered)
		}
		delivered = meta.Sequence.Consumer
		if !d.holds(part) {
			return next, errLeaseLapsed
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

var (
	errDeliveryGap = errors.New("another process reads the partition's consumer")
	errLeaseLapsed = errors.New("the partition's lease lapsed")
)

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
	js   jetstream.JetStream
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

func (s *DurableSnapshots) start(js jetstream.JetStream, kv jetstream.KeyValue, log *zap.Logger, m *Metrics) {
	s.js, s.kv, s.log, s.m = js, kv, log, m
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

// write puts one snapshot in the bucket, retrying a few times. A site's
// snapshots only move forward: one covering less of the input stream than
// the snapshot stored is not written. So a worker that lost a lease
// without knowing it (paused past the lease's expiry) cannot overwrite the
// newer state its successor wrote: the check and the write are one
// compare-and-set on the key's revision, read from the stream's leader.
func (s *DurableSnapshots) write(ctx context.Context, site string, seq uint64, data []byte) error {
	var err error
	for try := 0; try < 5; try++ {
		var written, kept bool
		if written, kept, err = s.writeOnce(ctx, site, seq, data); err == nil {
			if written {
				s.m.SnapshotBytes.Observe(float64(len(data)))
			}
			if kept {
				s.log.Info("snapshot not written: the stored one covers more of the stream",
					zap.String("site", site), zap.Uint64("seq", seq))
			}
			return nil
		}
		if !sleepCtx(ctx, time.Duration(try+1)*200*time.Millisecond) {
			break
		}
	}
	return fmt.Errorf("snapshot of %s at sequence %d: %w", site, seq, err)
}

// writeOnce makes one attempt of write; kept reports that a newer
// snapshot was found and left in place.
func (s *DurableSnapshots) writeOnce(ctx context.Context, site string, seq uint64, data []byte) (written, kept bool, err error) {
	cur, err := jet.Latest(ctx, s.js, jet.SnapshotBucket, site)
	if err != nil {
		return false, false, err
	}
	if cur.Found {
		// A stored value that is not a readable snapshot (another
		// version, corrupt) is replaced.
		if stored, err := SnapshotSeq(cur.Data); err == nil && stored > seq {
			return false, true, nil
		}
	}
	if cur.Revision == 0 {
		_, err = s.kv.Create(ctx, site, data)
	} else {
		_, err = s.kv.Update(ctx, site, data, cur.Revision)
	}
	return err == nil, false, err
}
