// Package lease shares plumb's input partitions among workers through leases
// in a JetStream key-value bucket (jet.LeaseBucket).
//
// # Keys
//
//	lease.<p>        the lease of partition p; its value names the holder
//	worker.<name>    the heartbeat of a live worker
//
// # Rules
//
// A worker acquires a free partition with a KV create, which fails if the key
// holds a value, and renews it every RenewEvery with an update conditioned on
// the revision it last wrote: an update refused for a wrong revision means the
// lease was lost. It writes its heartbeat at the same pace.
//
// Expiry is the server's business, never a comparison of clocks between
// workers: the bucket has a TTL (its MaxAge, jet.Layout.LeaseTTL, default 10
// seconds), so the servers remove a lease or heartbeat that was not written
// for a TTL, by their own clock, and leave a marker that watchers see. A
// free key is simply one that is absent, deleted or expired; taking over a
// dead worker's partition is an ordinary create.
//
// The holder keeps a lease for itself only while it can renew: it gives a
// lease up (calls OnLost) when 3/4 of the TTL have passed, on its own
// monotonic clock, since it sent the last write that the server confirmed.
// Since that write was stored after it was sent, the holder stops before the
// servers can expire the lease, provided clocks run at about the same rate
// and the servers of a cluster agree on the time within a quarter of the TTL
// (each replica ages messages on its own clock; NTP keeps them far closer).
// Processing is idempotent anyway (DESIGN.md, "Reliability"), so a rare
// overlap costs time, not correctness.
//
// # Balance
//
// Each worker aims at ceil(P/N) partitions, N being the number of live
// heartbeats including its own. A worker above its aim releases the extras
// (OnLost, then a delete conditioned on its revision), so that a joining
// worker finds free partitions; a worker below it creates leases on free
// partitions. A watch on the bucket wakes workers at once when a lease is
// released or expires or a worker joins or leaves; a full pass runs every
// RenewEvery regardless. A pass lists the bucket's live keys with a
// short-lived ordered consumer, so a worker costs the servers one consumer
// per pass.
//
// # Clocks
//
// Workers' wall clocks are never compared, and never used: the holder's
// deadlines are measured on the monotonic clock of its process, and expiry on
// the servers' clocks. The lease timing cannot be driven by a fake clock for
// that reason; the tests run real servers with a short TTL.
package lease

import (
	"bytes"
	"cmp"
	"context"
	"crypto/rand"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"slices"
	"strconv"
	"strings"
	"sync"
	"sync/atomic"
	"time"

	"github.com/nats-io/nats.go/jetstream"
	"go.uber.org/zap"
)

// Key prefixes in the lease bucket.
const (
	leasePrefix  = "lease."
	workerPrefix = "worker."
)

// Options configures a Manager. The zero value is ready to use (and not very
// useful without callbacks).
type Options struct {
	// RenewEvery is how often leases and the heartbeat are written; 0 means
	// a third of the bucket's TTL. It must be at most half the TTL.
	RenewEvery time.Duration
	// OnGained is called when the worker gains partition p, before the
	// worker may count on it; nil means no call.
	OnGained func(p int)
	// OnLost is called when the worker loses partition p, or releases it;
	// the worker must stop working on p before it returns: a released
	// lease is deleted only then (the manager renews it meanwhile), so the
	// next holder finds everything the worker wrote for p. nil means no
	// call.
	//
	// OnGained is called from Run's goroutine and must return promptly
	// (Run renews nothing while it runs). OnLost runs on a goroutine of
	// its own and may take its time (a final snapshot); for any one
	// partition the calls alternate, OnGained(p) never coming before the
	// previous OnLost(p) has returned.
	OnLost func(p int)
	// Logger; nil means no logging.
	Logger *zap.Logger
}

// Sentinel errors.
var (
	// ErrBadWorker is returned by New for a worker name that is not a
	// single KV key token (letters, digits, '-' and '_').
	ErrBadWorker = errors.New("lease: invalid worker name")
	// ErrBucketTTL is returned by Run when the bucket has no TTL, or one too
	// short for RenewEvery: leases could never expire.
	ErrBucketTTL = errors.New("lease: the bucket's TTL does not allow leases (create it with jet.Ensure)")
)

// Manager holds and balances one worker's partition leases. Run does the
// work; Owned may be called from any goroutine.
type Manager struct {
	kv     jetstream.KeyValue
	worker string
	n      int
	o      Options
	log    *zap.Logger
	value  []byte // what the worker writes: its name and a unique incarnation
	start  int    // first partition this worker tries, to spread contention

	running atomic.Bool

	// Set by Run.
	ttl, every, grace time.Duration

	mu    sync.Mutex
	owned map[int]*held // guarded by mu; written only by Run's goroutine

	// Run's goroutine only.
	losing   map[int]bool // OnLost running
	lostDone chan int     // an OnLost returned
}

type held struct {
	rev        uint64
	validUntil time.Time // the holder gives the lease up at this time
	renewAt    time.Time
	releasing  bool // OnLost runs; the key goes when it returns
}

// holder is the value of lease and heartbeat keys.
type holder struct {
	Worker      string `json:"worker"`
	Incarnation string `json:"incarnation"`
}

// New returns a Manager for the given worker over partitions 0..partitions-1
// of the lease bucket kv. Worker names must be unique among live workers,
// and all workers must use the same number of partitions (jet.Layout's). It
// panics if partitions < 1.
func New(kv jetstream.KeyValue, worker string, partitions int, o Options) (*Manager, error) {
	if partitions < 1 {
		panic("lease: " + strconv.Itoa(partitions) + " partitions")
	}
	if !validToken(worker) {
		return nil, fmt.Errorf("%w: %q", ErrBadWorker, worker)
	}
	var inc [8]byte
	if _, err := rand.Read(inc[:]); err != nil {
		return nil, fmt.Errorf("lease: incarnation: %w", err)
	}
	value, err := json.Marshal(holder{Worker: worker, Incarnation: hex.EncodeToString(inc[:])})
	if err != nil {
		return nil, fmt.Errorf("lease: %w", err)
	}
	log := o.Logger
	if log == nil {
		log = zap.NewNop()
	}
	var h uint32 = 2166136261 // FNV-1a of the name: where to start looking
	for i := 0; i < len(worker); i++ {
		h = (h ^ uint32(worker[i])) * 16777619
	}
	return &Manager{
		kv: kv, worker: worker, n: partitions, o: o,
		log:   log.With(zap.String("worker", worker)),
		value: value, start: int(h % uint32(partitions)),
		owned:  make(map[int]*held),
		losing: make(map[int]bool), lostDone: make(chan int, partitions),
	}, nil
}

func validToken(s string) bool {
	if s == "" || len(s) > 128 {
		return false
	}
	for _, r := range s {
		switch {
		case r >= 'a' && r <= 'z', r >= 'A' && r <= 'Z', r >= '0' && r <= '9', r == '-', r == '_':
		default:
			return false
		}
	}
	return true
}

func leaseKey(p int) string { return leasePrefix + strconv.Itoa(p) }

// Owned returns the partitions the worker holds now, sorted; the caller owns
// the slice.
func (m *Manager) Owned() []int {
	m.mu.Lock()
	defer m.mu.Unlock()
	ps := make([]int, 0, len(m.owned))
	for p := range m.owned {
		ps = append(ps, p)
	}
	slices.Sort(ps)
	return ps
}

// Holds reports whether the worker holds partition p's lease and its
// validity has not run out on this machine's clock. A worker checks it
// before acting for the partition: after a stall (a long pause, a
// suspended process) the lease may have lapsed before Run learns of it,
// and another worker may hold it already.
func (m *Manager) Holds(p int) bool {
	m.mu.Lock()
	defer m.mu.Unlock()
	h := m.owned[p]
	return h != nil && !h.releasing && time.Now().Before(h.validUntil)
}

// Run acquires, renews and balances leases until ctx is cancelled, then
// releases every lease it holds (calling OnLost for each) and removes the
// worker's heartbeat. It returns nil after a clean release, an error if the
// bucket cannot be used (ErrBucketTTL) or if releasing failed (those leases
// then expire after the TTL). Errors while running (a server unreachable for
// a while) are logged and retried; leases not renewed in time are lost. Run
// must be called once.
func (m *Manager) Run(ctx context.Context) error {
	if !m.running.CompareAndSwap(false, true) {
		panic("lease: Run called twice")
	}
	st, err := m.kv.Status(ctx)
	if err != nil {
		return fmt.Errorf("lease: bucket status: %w", err)
	}
	m.ttl = st.TTL()
	m.every = cmp.Or(m.o.RenewEvery, m.ttl/3)
	m.grace = m.ttl / 4
	if m.ttl <= 0 || m.every <= 0 || m.every > m.ttl/2 {
		return fmt.Errorf("%w: TTL %v, renewing every %v", ErrBucketTTL, m.ttl, m.every)
	}

	w, err := m.kv.WatchFiltered(ctx, []string{leasePrefix + ">", workerPrefix + ">"}, jetstream.UpdatesOnly(), jetstream.MetaOnly())
	if err != nil {
		return fmt.Errorf("lease: watch: %w", err)
	}
	updates := w.Updates()
	defer stopWatch(w)

	// A burst of changes (a worker releasing several leases) runs one pass.
	settle := min(m.every/10, 50*time.Millisecond)
	workers := map[string]bool{}
	timer := time.NewTimer(0)
	defer timer.Stop()
	var next time.Time
	for {
		select {
		case <-ctx.Done():
			return m.releaseAll(context.WithoutCancel(ctx))
		case <-timer.C:
			next, workers = m.pass(ctx)
		case p := <-m.lostDone:
			m.lostReturned(ctx, p)
			// The partition may be taken again, or by another worker.
			if soon := time.Now().Add(settle); soon.Before(next) {
				next = soon
			} else {
				continue
			}
		case e, ok := <-updates:
			if !ok {
				updates = nil // the watch ended; passes still run
				continue
			}
			if e == nil || !nudges(e, workers) {
				continue
			}
			if soon := time.Now().Add(settle); soon.Before(next) {
				next = soon
			} else {
				continue
			}
		}
		timer.Reset(time.Until(next)) // no stale tick since Go 1.23
	}
}

// nudges tells whether a bucket change may call for a pass before the next
// one due: a lease freed, or a worker joining or leaving.
func nudges(e jetstream.KeyValueEntry, workers map[string]bool) bool {
	gone := e.Operation() != jetstream.KeyValuePut
	switch {
	case strings.HasPrefix(e.Key(), leasePrefix):
		return gone
	case strings.HasPrefix(e.Key(), workerPrefix):
		return gone || !workers[strings.TrimPrefix(e.Key(), workerPrefix)]
	}
	return false
}

func stopWatch(w jetstream.KeyWatcher) {
	_ = w.Stop()
	// The watch's delivery may be blocked on a full channel; drain it until
	// the watch closes it.
	t := time.NewTimer(2 * time.Second)
	defer t.Stop()
	for {
		select {
		case _, ok := <-w.Updates():
			if !ok {
				return
			}
		case <-t.C:
			return
		}
	}
}

// call returns a context for one request to the bucket.
func (m *Manager) call(ctx context.Context) (context.Context, context.CancelFunc) {
	return context.WithTimeout(ctx, m.every/2)
}

// pass renews what is due, then balances. It returns when the next pass is
// due and the live workers it saw (nil if it could not look).
func (m *Manager) pass(ctx context.Context) (time.Time, map[string]bool) {
	m.dropOverdue()
	m.heartbeat(ctx)
	for _, p := range m.Owned() {
		if h := m.owned[p]; !time.Now().Before(h.renewAt) {
			m.renew(ctx, p, h)
		}
	}
	m.dropOverdue()

	leases, workers, err := m.list(ctx)
	if err != nil {
		if ctx.Err() == nil {
			m.log.Warn("lease: list bucket", zap.Error(err))
		}
		return m.nextPass(), nil
	}
	workers[m.worker] = true
	owned := m.Owned()
	var keep []int
	for _, p := range owned {
		if !m.owned[p].releasing {
			keep = append(keep, p)
		}
	}
	for _, p := range toRelease(keep, m.n, len(workers)) {
		m.release(p)
	}
	want := aim(m.n, len(workers)) - len(owned)
	for _, p := range candidates(m.n, m.start, owned, leases) {
		if want <= 0 || ctx.Err() != nil {
			break
		}
		if m.losing[p] {
			continue // its OnLost has not returned
		}
		if m.acquire(ctx, p) {
			want--
		}
	}
	return m.nextPass(), workers
}

// aim returns the number of partitions a worker aims at: ceil(n/workers).
func aim(n, workers int) int { return (n + workers - 1) / workers }

// toRelease returns the partitions to release from owned (sorted) to come
// down to the aim: the highest ones.
func toRelease(owned []int, n, workers int) []int {
	if extra := len(owned) - aim(n, workers); extra > 0 {
		return owned[len(owned)-extra:]
	}
	return nil
}

// candidates returns the partitions neither owned nor leased, in the order
// to try them: from start on, wrapping around.
func candidates(n, start int, owned []int, leased map[int]bool) []int {
	var ps []int
	for i := range n {
		p := (start + i) % n
		if !leased[p] && !slices.Contains(owned, p) {
			ps = append(ps, p)
		}
	}
	return ps
}

// nextPass returns when the next pass is due: a renewal or a lease's end,
// and at most RenewEvery from now.
func (m *Manager) nextPass() time.Time {
	next := time.Now().Add(m.every)
	m.mu.Lock()
	defer m.mu.Unlock()
	for _, h := range m.owned {
		next = minTime(next, h.renewAt, h.validUntil)
	}
	return next
}

func minTime(t time.Time, more ...time.Time) time.Time {
	for _, u := range more {
		if u.Before(t) {
			t = u
		}
	}
	return t
}

// dropOverdue loses the leases not renewed in time.
func (m *Manager) dropOverdue() {
	now := time.Now()
	for _, p := range m.Owned() {
		if !now.Before(m.owned[p].validUntil) {
			m.log.Warn("lease: not renewed in time", zap.Int("partition", p))
			m.lose(p)
		}
	}
}

func (m *Manager) heartbeat(ctx context.Context) {
	cctx, cancel := m.call(ctx)
	defer cancel()
	if _, err := m.kv.Put(cctx, workerPrefix+m.worker, m.value); err != nil && ctx.Err() == nil {
		m.log.Warn("lease: heartbeat", zap.Error(err))
	}
}

func (m *Manager) renew(ctx context.Context, p int, h *held) {
	for attempt := 0; attempt < 2; attempt++ {
		sent := time.Now()
		cctx, cancel := m.call(ctx)
		rev, err := m.kv.Update(cctx, leaseKey(p), m.value, h.rev)
		cancel()
		switch {
		case err == nil:
			m.mu.Lock()
			h.rev, h.validUntil, h.renewAt = rev, sent.Add(m.ttl-m.grace), sent.Add(m.every)
			m.mu.Unlock()
			return
		case errors.Is(err, jetstream.ErrKeyRevisionMismatch):
			// A write whose answer we missed may have gone through: the
			// lease is still ours if it holds our value.
			cctx, cancel := m.call(ctx)
			e, gerr := m.kv.Get(cctx, leaseKey(p))
			cancel()
			if gerr == nil && bytes.Equal(e.Value(), m.value) && attempt == 0 {
				h.rev = e.Revision()
				continue
			}
			m.log.Info("lease: lost", zap.Int("partition", p), zap.Error(err))
			m.lose(p)
			return
		default:
			if ctx.Err() == nil {
				m.log.Warn("lease: renew", zap.Int("partition", p), zap.Error(err))
			}
			h.renewAt = time.Now().Add(m.every / 2)
			return
		}
	}
}

func (m *Manager) acquire(ctx context.Context, p int) bool {
	sent := time.Now()
	cctx, cancel := m.call(ctx)
	rev, err := m.kv.Create(cctx, leaseKey(p), m.value)
	cancel()
	if err != nil {
		if !errors.Is(err, jetstream.ErrKeyExists) && ctx.Err() == nil {
			m.log.Warn("lease: acquire", zap.Int("partition", p), zap.Error(err))
		}
		return false
	}
	m.mu.Lock()
	m.owned[p] = &held{rev: rev, validUntil: sent.Add(m.ttl - m.grace), renewAt: sent.Add(m.every)}
	m.mu.Unlock()
	m.log.Debug("lease: gained", zap.Int("partition", p))
	if m.o.OnGained != nil {
		m.o.OnGained(p)
	}
	return true
}

// lose forgets partition p and tells the worker (unless a release of p
// already did).
func (m *Manager) lose(p int) {
	m.mu.Lock()
	h := m.owned[p]
	delete(m.owned, p)
	m.mu.Unlock()
	if h == nil || h.releasing {
		return // OnLost runs already; its return deletes nothing now
	}
	m.callLost(p)
}

// callLost runs OnLost(p) on its own goroutine; Run learns of its return
// through lostDone.
func (m *Manager) callLost(p int) {
	m.losing[p] = true
	go func() {
		if m.o.OnLost != nil {
			m.o.OnLost(p)
		}
		m.lostDone <- p
	}()
}

// release gives partition p up: OnLost runs while the lease is still
// renewed, and its lease is deleted when OnLost returns (lostReturned).
func (m *Manager) release(p int) {
	h := m.owned[p]
	if h == nil || h.releasing {
		return
	}
	m.mu.Lock()
	h.releasing = true
	m.mu.Unlock()
	m.log.Debug("lease: releasing", zap.Int("partition", p))
	m.callLost(p)
}

// lostReturned ends the loss or release of p whose OnLost returned: a
// lease still held (a release) is deleted.
func (m *Manager) lostReturned(ctx context.Context, p int) error {
	delete(m.losing, p)
	h := m.owned[p]
	if h == nil || !h.releasing {
		return nil // lost meanwhile (not renewed in time, or taken)
	}
	m.mu.Lock()
	delete(m.owned, p)
	m.mu.Unlock()
	return m.deleteLease(ctx, p, h.rev)
}

// deleteLease deletes p's lease if it still holds the revision written
// last.
func (m *Manager) deleteLease(ctx context.Context, p int, rev uint64) error {
	cctx, cancel := m.call(ctx)
	defer cancel()
	err := m.kv.Delete(cctx, leaseKey(p), jetstream.LastRevision(rev))
	// A revision mismatch means either that a renewal whose answer we
	// missed went through (the key holds our value at a later revision),
	// or that the lease expired and another worker took it. Reads may come
	// from a replica that lags behind, so look a few times before deciding.
	for try := 0; errors.Is(err, jetstream.ErrKeyRevisionMismatch) && try < 5; try++ {
		if try > 0 {
			time.Sleep(time.Duration(try) * 50 * time.Millisecond)
		}
		e, gerr := m.kv.Get(cctx, leaseKey(p))
		switch {
		case gerr == nil && bytes.Equal(e.Value(), m.value):
			err = m.kv.Delete(cctx, leaseKey(p), jetstream.LastRevision(e.Revision()))
		case gerr != nil && !errors.Is(gerr, jetstream.ErrKeyNotFound):
			err = gerr
		case try == 4:
			m.log.Info("lease: already taken over", zap.Int("partition", p))
			return nil
		}
	}
	if err != nil {
		m.log.Warn("lease: release", zap.Int("partition", p), zap.Error(err))
		return fmt.Errorf("lease: release partition %d: %w", p, err)
	}
	m.log.Debug("lease: released", zap.Int("partition", p))
	return nil
}

// releaseAll releases every lease held and waits for the losses and
// releases under way, renewing what is still held meanwhile.
func (m *Manager) releaseAll(ctx context.Context) error {
	var errs []error
	for _, p := range m.Owned() {
		m.release(p)
	}
	renew := time.NewTicker(m.every)
	defer renew.Stop()
	for len(m.losing) > 0 {
		select {
		case p := <-m.lostDone:
			errs = append(errs, m.lostReturned(ctx, p))
		case <-renew.C:
			for _, p := range m.Owned() {
				if h := m.owned[p]; !time.Now().Before(h.renewAt) {
					m.renew(ctx, p, h)
				}
			}
		}
	}
	cctx, cancel := m.call(ctx)
	defer cancel()
	if err := m.kv.Delete(cctx, workerPrefix+m.worker); err != nil {
		errs = append(errs, fmt.Errorf("lease: remove heartbeat: %w", err))
	}
	return errors.Join(errs...)
}

// list returns the partitions leased and the live workers, as the bucket
// holds them now.
func (m *Manager) list(ctx context.Context) (map[int]bool, map[string]bool, error) {
	cctx, cancel := context.WithTimeout(ctx, m.every)
	defer cancel()
	w, err := m.kv.WatchFiltered(cctx, []string{leasePrefix + ">", workerPrefix + ">"}, jetstream.IgnoreDeletes(), jetstream.MetaOnly())
	if err != nil {
		return nil, nil, err
	}
	defer stopWatch(w)
	leases, workers := map[int]bool{}, map[string]bool{}
	for {
		select {
		case e, ok := <-w.Updates():
			if !ok {
				return nil, nil, errors.New("lease: listing ended early")
			}
			if e == nil {
				return leases, workers, nil
			}
			if name, ok := strings.CutPrefix(e.Key(), workerPrefix); ok {
				workers[name] = true
			} else if ps, ok := strings.CutPrefix(e.Key(), leasePrefix); ok {
				if p, err := strconv.Atoi(ps); err == nil {
					leases[p] = true
				}
			}
		case <-cctx.Done():
			return nil, nil, cctx.Err()
		}
	}
}
