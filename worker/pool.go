package worker

import (
	"context"
	"errors"
	"fmt"
	"hash/fnv"
	"slices"
	"strings"
	"sync"
	"sync/atomic"
	"time"

	"go.uber.org/zap"

	"github.com/plumb-forecast/plumb/conformal"
	"github.com/plumb-forecast/plumb/model"
	"github.com/plumb-forecast/plumb/stream"
)

// Output receives what the pool produces. Its methods are called from the
// pool's shard goroutines, concurrently for different sites, and must be
// safe for that. A bundle is only valid during the call.
type Output interface {
	Bundle(b *model.Bundle) error
	Alarm(e conformal.Event) error
	Reject(r stream.Reject) error
}

// PoolOptions configures a Pool. Zero fields take the documented defaults.
type PoolOptions struct {
	// Shards is the number of goroutines actors are spread over; 0 means 2.
	Shards int
	// QueueLen bounds each shard's input queue; 0 means 4096. A full queue
	// makes Submit wait (and counts it), so a burst slows the producer
	// instead of losing inputs.
	QueueLen int
	// PublishAll publishes every bundle. By default a bundle is skipped when
	// a newer input for the same site is already queued (its refresh follows
	// at once); the site's state is the same either way, only fewer bundles
	// go out during a burst.
	PublishAll bool
	// Decoder limits for inputs; its Sites field is filled by the pool.
	Decoder stream.Decoder
	// Logger; nil means no logging.
	Logger *zap.Logger
	// Metrics; nil means unregistered metrics.
	Metrics *Metrics
	// Clock gives wall time for latency metrics and the health checks
	// only; nil means time.Now.
	Clock func() time.Time
	// Health configures the input health checks (stale weather, meter
	// gaps, reject rate).
	Health HealthOptions
	// SnapshotEvery, with OnSnapshot, snapshots a site's actor after every
	// SnapshotEvery inputs submitted with a stream sequence (SubmitSeq);
	// 0 means 500.
	SnapshotEvery int
	// OnSnapshot, if set, receives each periodic snapshot: the site, the
	// last stream sequence it covers and the bytes (Actor.Snapshot). It is
	// called on the site's shard goroutine: it should hand the bytes on
	// (to a bounded queue) rather than write them itself.
	OnSnapshot func(site string, seq uint64, data []byte)
}

// ErrClosed is returned by Submit after the pool has stopped.
var ErrClosed = errors.New("worker: pool closed")

type item struct {
	kind    stream.InputKind
	site    string
	subject string
	data    []byte
	seq     uint64 // input stream sequence (SubmitSeq), 0 if none
	ack     func() // called once the input is applied or skipped (SubmitSeq)
	ctl     func() // a control request run on the shard's goroutine
}

type shard struct {
	q      chan item
	actors map[string]*Actor
	// bundle is the refreshed bundle of whichever site of the shard ran
	// last (Actor.RefreshInto): an Output is done with a bundle when its
	// call returns, so one per shard does, not one per site (about 40 KB
	// a site with the default horizon and levels).
	bundle model.Bundle
	// Per site: the last stream sequence applied, and inputs applied
	// since the last snapshot. Only the shard's goroutine touches them.
	seq   map[string]uint64
	since map[string]int
}

// Pool routes inputs to site actors, one goroutine per shard, and sends
// bundles, alarms and rejects to an Output. Every site belongs to exactly
// one shard, so a site's inputs are applied in the order submitted.
type Pool struct {
	cfg     Config
	out     Output
	o       PoolOptions
	log     *zap.Logger
	m       *Metrics
	dec     stream.Decoder
	shards  []*shard
	home    map[string]*shard
	queued  map[string]*atomic.Int32
	health  map[string]*siteHealth
	order   []string // site ids in registry order
	started time.Time

	mu     sync.RWMutex
	closed bool

	appliedWeather, appliedMeter atomic.Int64
}

// Applied returns how many weather runs and meter readings the actors have
// applied so far.
func (p *Pool) Applied() (weather, meter int64) {
	return p.appliedWeather.Load(), p.appliedMeter.Load()
}

// NewPool builds actors for every site.
func NewPool(sites []model.Site, cfg Config, out Output, o PoolOptions) (*Pool, error) {
	cfg = cfg.WithDefaults()
	if cfg.Reorder < 0 || cfg.Reorder > cfg.Lateness {
		return nil, fmt.Errorf("worker: reorder window %s: must lie between 0 and the lateness %s", cfg.Reorder, cfg.Lateness)
	}
	if o.Shards <= 0 {
		o.Shards = 2
	}
	if o.QueueLen <= 0 {
		o.QueueLen = 4096
	}
	if o.Logger == nil {
		o.Logger = zap.NewNop()
	}
	if o.Metrics == nil {
		o.Metrics = NewMetrics(nil)
	}
	if o.Clock == nil {
		o.Clock = time.Now
	}
	if o.SnapshotEvery <= 0 {
		o.SnapshotEvery = 500
	}
	o.Health = o.Health.withDefaults()
	p := &Pool{
		cfg: cfg, out: out, o: o, log: o.Logger, m: o.Metrics,
		dec:     o.Decoder,
		home:    make(map[string]*shard, len(sites)),
		queued:  make(map[string]*atomic.Int32, len(sites)),
		health:  make(map[string]*siteHealth, len(sites)),
		started: o.Clock(),
	}
	p.dec.Sites = make(map[string]model.Site, len(sites))
	for i := 0; i < o.Shards; i++ {
		p.shards = append(p.shards, &shard{q: make(chan item, o.QueueLen), actors: map[string]*Actor{},
			seq: map[string]uint64{}, since: map[string]int{}})
	}
	for _, s := range sites {
		a, err := NewActor(s, cfg)
		if err != nil {
			return nil, err
		}
		h := fnv.New32a()
		h.Write([]byte(s.ID))
		sh := p.shards[int(h.Sum32()%uint32(len(p.shards)))]
		sh.actors[s.ID] = a
		p.home[s.ID] = sh
		p.queued[s.ID] = new(atomic.Int32)
		p.health[s.ID] = &siteHealth{raised: map[string]bool{}}
		p.order = append(p.order, s.ID)
		p.dec.Sites[s.ID] = s
	}
	return p, nil
}

// Config returns the actors' configuration, defaults filled in.
func (p *Pool) Config() Config { return p.cfg }

// Submit queues one input message received on subject. It rejects at once
// what cannot be routed (bad subject, unknown site) and otherwise waits for
// room in the site's shard queue. It returns ErrClosed after Run has ended.
func (p *Pool) Submit(subject string, data []byte) error {
	return p.SubmitSeq(subject, data, 0, nil)
}

// SubmitSeq is Submit for an input read from a stream at sequence seq
// (> 0): an input at or below the last sequence its site has applied (a
// redelivery, or a replay after a restore) is skipped, and ack, if not
// nil, is called once the input is applied, skipped or rejected.
func (p *Pool) SubmitSeq(subject string, data []byte, seq uint64, ack func()) error {
	kind, site, err := stream.ParseInputSubject(subject)
	if err == nil {
		if _, ok := p.home[site]; !ok {
			err = &stream.RejectError{Reason: stream.ReasonUnknownSite, Site: site, Detail: fmt.Sprintf("site %q is not in the registry", site)}
		}
	}
	if err != nil {
		p.reject(subject, site, len(data), err)
		if ack != nil {
			ack()
		}
		return nil
	}
	p.mu.RLock()
	defer p.mu.RUnlock()
	if p.closed {
		return ErrClosed
	}
	it := item{kind: kind, site: site, subject: subject, data: data, seq: seq, ack: ack}
	sh := p.home[site]
	p.queued[site].Add(1)
	p.m.QueueDepth.Inc()
	select {
	case sh.q <- it:
	default:
		p.m.QueueFull.Inc()
		sh.q <- it
	}
	return nil
}

// Run applies queued inputs until ctx is cancelled, then stops accepting
// inputs, applies what is already queued and returns.
func (p *Pool) Run(ctx context.Context) error {
	var wg sync.WaitGroup
	wg.Add(1)
	go func() {
		defer wg.Done()
		p.runHealth(ctx)
	}()
	for _, sh := range p.shards {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for it := range sh.q {
				if it.ctl != nil {
					it.ctl()
					continue
				}
				p.apply(sh, it)
			}
		}()
	}
	<-ctx.Done()
	p.mu.Lock()
	p.closed = true
	for _, sh := range p.shards {
		close(sh.q)
	}
	p.mu.Unlock()
	wg.Wait()
	return nil
}

// Idle reports whether no input is queued or being applied.
func (p *Pool) Idle() bool {
	for _, q := range p.queued {
		if q.Load() != 0 {
			return false
		}
	}
	return true
}

func (p *Pool) reject(subject, site string, size int, err error) {
	reason, ok := stream.RejectOf(err)
	switch {
	case ok:
	case errors.Is(err, ErrDuplicate):
		reason = stream.ReasonDuplicate
	case errors.Is(err, ErrTooLate):
		reason = stream.ReasonTooLate
	case errors.Is(err, ErrTooFarAhead):
		reason = stream.ReasonBadTime
	default:
		reason = stream.ReasonMalformed
	}
	p.m.Rejects.WithLabelValues(string(reason)).Inc()
	if h := p.health[site]; h != nil {
		h.rejects.Add(1)
	}
	r := stream.Reject{Subject: subject, Site: site, Reason: string(reason), Detail: err.Error(), Bytes: size}
	p.log.Debug("input rejected", zap.String("subject", subject), zap.String("reason", string(reason)), zap.Error(err))
	if err := p.out.Reject(r); err != nil {
		p.log.Warn("publish reject", zap.Error(err))
	}
}

func (p *Pool) apply(sh *shard, it item) {
	if it.ack != nil {
		defer it.ack()
	}
	if it.seq != 0 && it.seq <= sh.seq[it.site] {
		p.queued[it.site].Add(-1)
		p.m.QueueDepth.Dec()
		p.m.Redelivered.Inc()
		return
	}
	t0 := p.o.Clock()
	a := sh.actors[it.site]
	if it.seq != 0 {
		defer p.afterSeq(sh, a, it)
	}
	h := p.health[it.site]
	h.inputs.Add(1)
	var b *model.Bundle
	if p.cfg.Reorder > 0 {
		key, err := p.eventTime(it)
		if err != nil {
			p.reject(it.subject, it.site, len(it.data), err)
		} else {
			for _, in := range a.hold(heldInput{kind: it.kind, subject: it.subject, data: it.data, key: key}) {
				if nb := p.applyInput(sh, a, h, it.site, in.kind, in.subject, in.data, t0); nb != nil {
					b = nb
				}
			}
		}
	} else {
		b = p.applyInput(sh, a, h, it.site, it.kind, it.subject, it.data, t0)
	}
	left := p.queued[it.site].Add(-1)
	p.m.QueueDepth.Dec()
	if b == nil {
		return
	}
	if left > 0 && !p.o.PublishAll {
		p.m.Coalesced.Inc()
	} else if err := p.out.Bundle(b); err != nil {
		p.log.Warn("publish bundle", zap.String("site", it.site), zap.Error(err))
	} else {
		p.m.Published.Inc()
	}
	p.m.RefreshSeconds.Observe(p.o.Clock().Sub(t0).Seconds())
}

// applyInput applies one input message to the site's actor, rejecting
// what the actor refuses, and refreshes the actor if anything was applied;
// it publishes the alarm events and returns the bundle (nil if nothing was
// applied).
func (p *Pool) applyInput(sh *shard, a *Actor, h *siteHealth, site string, kind stream.InputKind, subject string, data []byte, t0 time.Time) *model.Bundle {
	applied := 0
	switch kind {
	case stream.InputWeather:
		runs, err := p.dec.Weather(site, data)
		if err != nil {
			p.reject(subject, site, len(data), err)
			break
		}
		for i := range runs {
			if err := a.Weather(&runs[i]); err != nil {
				p.reject(subject, site, len(data), err)
				continue
			}
			applied++
		}
		p.m.Inputs.WithLabelValues("weather").Add(float64(applied))
		p.appliedWeather.Add(int64(applied))
		if applied > 0 {
			h.lastWeather.Store(t0.UnixNano())
		}
	case stream.InputMeter:
		rs, err := p.dec.Meter(site, data)
		if err != nil {
			p.reject(subject, site, len(data), err)
			break
		}
		for i := range rs {
			if err := a.Meter(&rs[i]); err != nil {
				p.reject(subject, site, len(data), err)
				continue
			}
			applied++
		}
		p.m.Inputs.WithLabelValues("meter").Add(float64(applied))
		p.appliedMeter.Add(int64(applied))
		if applied > 0 {
			h.lastMeter.Store(t0.UnixNano())
		}
		p.m.Settled.Add(float64(applied))
	}
	if applied == 0 {
		return nil
	}
	b := a.RefreshInto(&sh.bundle)
	for _, ev := range a.Events() {
		p.m.AlarmEvents.WithLabelValues(ev.Kind, ev.State).Inc()
		if ev.State == conformal.StateRaised {
			p.m.AlarmsActive.Inc()
		} else {
			p.m.AlarmsActive.Dec()
		}
		if err := p.out.Alarm(ev); err != nil {
			p.log.Warn("publish alarm", zap.String("site", site), zap.Error(err))
		}
	}
	if b != nil {
		p.m.Refreshes.Inc()
	}
	return b
}

// eventTime returns an input message's event time for the reorder
// window: the latest issue time of its runs, or the latest end of its
// readings.
func (p *Pool) eventTime(it item) (time.Time, error) {
	var t time.Time
	switch it.kind {
	case stream.InputWeather:
		runs, err := p.dec.Weather(it.site, it.data)
		if err != nil {
			return t, err
		}
		for i := range runs {
			if runs[i].IssuedAt.After(t) {
				t = runs[i].IssuedAt
			}
		}
	case stream.InputMeter:
		rs, err := p.dec.Meter(it.site, it.data)
		if err != nil {
			return t, err
		}
		for i := range rs {
			if e := rs[i].End(); e.After(t) {
				t = e
			}
		}
	}
	return t, nil
}

// afterSeq records that the input at it.seq is applied to the site, and
// snapshots the actor every SnapshotEvery such inputs.
func (p *Pool) afterSeq(sh *shard, a *Actor, it item) {
	sh.seq[it.site] = it.seq
	sh.since[it.site]++
	if p.o.OnSnapshot == nil || sh.since[it.site] < p.o.SnapshotEvery {
		return
	}
	sh.since[it.site] = 0
	data, err := a.Snapshot(it.seq)
	if err != nil {
		p.log.Error("snapshot", zap.String("site", it.site), zap.Error(err))
		return
	}
	p.m.Snapshots.Inc()
	p.o.OnSnapshot(it.site, it.seq, data)
}

// control runs f on the shard goroutine of site and waits for it.
func (p *Pool) control(ctx context.Context, site string, f func(sh *shard)) error {
	sh, ok := p.home[site]
	if !ok {
		return fmt.Errorf("worker: site %q: %w", site, ErrUnknownSite)
	}
	done := make(chan struct{})
	p.mu.RLock()
	if p.closed {
		p.mu.RUnlock()
		return ErrClosed
	}
	select {
	case sh.q <- item{ctl: func() { defer close(done); f(sh) }}:
	case <-ctx.Done():
		p.mu.RUnlock()
		return ctx.Err()
	}
	p.mu.RUnlock()
	select {
	case <-done:
		return nil
	case <-ctx.Done():
		return ctx.Err()
	}
}

// Restore replaces a site's actor by the one a snapshot holds (nil data:
// a fresh actor) and returns the stream sequence it covers (0 for a
// fresh actor). It runs on the site's shard goroutine, after the inputs
// queued before it.
func (p *Pool) Restore(ctx context.Context, site string, data []byte) (uint64, error) {
	var seq uint64
	var rerr error
	err := p.control(ctx, site, func(sh *shard) {
		var a *Actor
		var err error
		if data == nil {
			a, err = NewActor(p.dec.Sites[site], p.cfg)
		} else {
			a, seq, err = RestoreActor(p.dec.Sites[site], p.cfg, data)
		}
		if err != nil {
			rerr = err
			return
		}
		sh.actors[site] = a
		sh.seq[site] = seq
		sh.since[site] = 0
	})
	if err != nil {
		return 0, err
	}
	return seq, rerr
}

// Snapshot returns a snapshot of a site's actor and the stream sequence it
// covers, taken on the site's shard goroutine after the inputs queued
// before it.
func (p *Pool) Snapshot(ctx context.Context, site string) (data []byte, seq uint64, err error) {
	var serr error
	err = p.control(ctx, site, func(sh *shard) {
		seq = sh.seq[site]
		data, serr = sh.actors[site].Snapshot(seq)
		sh.since[site] = 0
	})
	if err != nil {
		return nil, 0, err
	}
	if serr != nil {
		return nil, 0, fmt.Errorf("worker: snapshot %s: %w", site, serr)
	}
	p.m.Snapshots.Inc()
	return data, seq, nil
}

// SnapshotIfChanged is Snapshot for a site that applied stream inputs
// since its last snapshot; otherwise it returns nil data.
func (p *Pool) SnapshotIfChanged(ctx context.Context, site string) (data []byte, seq uint64, err error) {
	var serr error
	err = p.control(ctx, site, func(sh *shard) {
		if sh.since[site] == 0 {
			return
		}
		seq = sh.seq[site]
		data, serr = sh.actors[site].Snapshot(seq)
		sh.since[site] = 0
	})
	if err != nil {
		return nil, 0, err
	}
	if serr != nil {
		return nil, 0, fmt.Errorf("worker: snapshot %s: %w", site, serr)
	}
	if data != nil {
		p.m.Snapshots.Inc()
	}
	return data, seq, nil
}

// Sites returns the site ids in registry order. The slice is the caller's.
func (p *Pool) Sites() []string { return slices.Clone(p.order) }

// SiteStats is a snapshot of one site's coverage.
type SiteStats struct {
	Site         string
	Now          time.Time
	Levels       []LevelStats
	ActiveAlarms int
}

// ErrUnknownSite is wrapped by the Pool's methods for a site not in its
// registry.
var ErrUnknownSite = errors.New("site not in the registry")

// ErrNotHeld is wrapped by Pool.Coverage for a site in the registry whose
// actor this pool does not hold (in durable mode, a site of a partition
// another worker leases).
var ErrNotHeld = errors.New("site not held by this worker")

// Coverage returns the coverage monitor's reading of one site
// (Actor.Coverage), taken on its shard's goroutine after the inputs queued
// before it.
func (p *Pool) Coverage(ctx context.Context, site string) ([]CellReport, error) {
	var out []CellReport
	held := false
	err := p.control(ctx, site, func(sh *shard) {
		if a, ok := sh.actors[site]; ok {
			held, out = true, a.Coverage()
		}
	})
	if err != nil {
		return nil, err
	}
	if !held {
		return nil, fmt.Errorf("worker: site %q: %w", site, ErrNotHeld)
	}
	return out, nil
}

// Stats returns a snapshot of every site's coverage, sorted by site id. It runs on the shards' goroutines, after the inputs queued
// before it.
func (p *Pool) Stats(ctx context.Context) ([]SiteStats, error) {
	var mu sync.Mutex
	got := map[string]SiteStats{}
	var wg sync.WaitGroup
	p.mu.RLock()
	if p.closed {
		p.mu.RUnlock()
		return nil, ErrClosed
	}
	for _, sh := range p.shards {
		wg.Add(1)
		sh.q <- item{ctl: func() {
			defer wg.Done()
			for id, a := range sh.actors {
				s := SiteStats{Site: id, Now: a.Now(), Levels: a.Stats(), ActiveAlarms: a.ActiveAlarms()}
				mu.Lock()
				got[id] = s
				mu.Unlock()
			}
		}}
	}
	p.mu.RUnlock()
	done := make(chan struct{})
	go func() { wg.Wait(); close(done) }()
	select {
	case <-done:
	case <-ctx.Done():
		return nil, ctx.Err()
	}
	out := make([]SiteStats, 0, len(got))
	for id := range p.home {
		out = append(out, got[id])
	}
	slices.SortFunc(out, func(a, b SiteStats) int { return strings.Compare(a.Site, b.Site) })
	return out, nil
}
