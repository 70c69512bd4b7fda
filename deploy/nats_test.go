package deploy

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"net"
	"net/url"
	"os"
	"path/filepath"
	"regexp"
	"slices"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"
	"go.uber.org/goleak"

	"github.com/plumb-forecast/plumb/internal/sharedtest"
	"github.com/plumb-forecast/plumb/stream"
	"github.com/plumb-forecast/plumb/stream/jet"
	"github.com/plumb-forecast/plumb/stream/lease"
)

func TestMain(m *testing.M) { goleak.VerifyTestMain(m) }

// The password variables of cluster/accounts.conf, by user.
var passwordVars = map[string]string{
	"producer": "PLUMB_PRODUCER_PASSWORD",
	"worker":   "PLUMB_WORKER_PASSWORD",
	"bot":      "PLUMB_BOT_PASSWORD",
	"sys":      "PLUMB_SYS_PASSWORD",
}

// clusterNodes are the server names (and compose services) of the cluster.
var clusterNodes = []string{"nats-1", "nats-2", "nats-3"}

// setPasswords sets every password variable to a distinct test value, for
// the test, and returns the values by variable.
func setPasswords(t *testing.T) map[string]string {
	t.Helper()
	vals := map[string]string{}
	for _, v := range passwordVars {
		vals[v] = "test-" + strings.ToLower(v)
		t.Setenv(v, vals[v])
	}
	return vals
}

// loadNATS parses a server configuration file with the server's own parser
// (includes resolve relative to the file); the password variables must be
// set.
func loadNATS(t *testing.T, rel string) *server.Options {
	t.Helper()
	path := filepath.Join(sharedtest.Root(t), "deploy", rel)
	opts, err := server.ProcessConfigFile(path)
	if err != nil {
		t.Fatalf("%s: %v", rel, err)
	}
	return opts
}

// forTest rewrites loaded options to run in this process: loopback, a free
// client port, no monitoring port, a temporary store folder, no logs. With
// routes nil the server runs alone (its cluster block dropped); otherwise it
// joins them, listening for routes on clusterPort.
func forTest(t *testing.T, o *server.Options, clusterPort int, routes []*url.URL) {
	t.Helper()
	o.Host, o.Port, o.HTTPPort = "127.0.0.1", -1, 0
	o.StoreDir = t.TempDir()
	o.NoLog, o.NoSigs = true, true
	if routes == nil {
		o.Cluster = server.ClusterOpts{}
		o.Routes, o.RoutesStr = nil, ""
		return
	}
	o.Cluster.Host, o.Cluster.Port = "127.0.0.1", clusterPort
	o.Routes = routes
}

// start starts a server with o and stops it at the test's end.
func start(t *testing.T, o *server.Options) *server.Server {
	t.Helper()
	s, err := server.NewServer(o)
	if err != nil {
		t.Fatalf("server %s: %v", o.ServerName, err)
	}
	t.Cleanup(func() {
		s.Shutdown()
		s.WaitForShutdown()
	})
	go s.Start()
	if !s.ReadyForConnections(10 * time.Second) {
		t.Fatalf("server %s not ready after 10s", o.ServerName)
	}
	return s
}

// varRef matches the variable references of a NATS configuration.
var varRef = regexp.MustCompile(`\$([A-Za-z_][A-Za-z0-9_]*)`)

// configVars returns the variables the configuration files in dir refer to
// (outside comments), sorted.
func configVars(t *testing.T, dir string) []string {
	t.Helper()
	files, err := filepath.Glob(filepath.Join(dir, "*.conf"))
	if err != nil || len(files) == 0 {
		t.Fatalf("no configuration files in %s (%v)", dir, err)
	}
	var vars []string
	for _, f := range files {
		data, err := os.ReadFile(f)
		if err != nil {
			t.Fatal(err)
		}
		for _, line := range strings.Split(string(data), "\n") {
			if i := strings.Index(line, "#"); i >= 0 {
				line = line[:i]
			}
			for _, m := range varRef.FindAllStringSubmatch(line, -1) {
				// Subjects such as "$JS.API.INFO" are quoted values, not
				// references; a reference stands unquoted after a colon.
				if !strings.Contains(line, `"`+m[0]) && !slices.Contains(vars, m[1]) {
					vars = append(vars, m[1])
				}
			}
		}
	}
	slices.Sort(vars)
	return vars
}

func TestClusterConfigs(t *testing.T) {
	pw := setPasswords(t)
	t.Run("variables", func(t *testing.T) {
		got := configVars(t, filepath.Join(sharedtest.Root(t), "deploy", "cluster"))
		var want []string
		for _, v := range passwordVars {
			want = append(want, v)
		}
		slices.Sort(want)
		if !slices.Equal(got, want) {
			t.Errorf("cluster configuration refers to variables %v, want exactly %v", got, want)
		}
	})
	for _, name := range clusterNodes {
		t.Run(name, func(t *testing.T) {
			o := loadNATS(t, "cluster/"+name+".conf")
			if o.ServerName != name {
				t.Errorf("server_name %q, want %q (unique per server, JetStream clustering needs it)", o.ServerName, name)
			}
			if o.Port != 4222 || o.HTTPPort != 8222 {
				t.Errorf("client port %d, monitoring port %d, want 4222 and 8222", o.Port, o.HTTPPort)
			}
			if o.MaxPayload != 8<<20 {
				t.Errorf("max_payload %d, want 8 MB for snapshots", o.MaxPayload)
			}
			if !o.JetStream || o.StoreDir == "" {
				t.Errorf("JetStream %v, store_dir %q: want JetStream on with a store folder", o.JetStream, o.StoreDir)
			}
			if o.Cluster.Name != "plumb" || o.Cluster.Port != 6222 {
				t.Errorf("cluster %q on port %d, want plumb on 6222", o.Cluster.Name, o.Cluster.Port)
			}
			var hosts []string
			for _, r := range o.Routes {
				if r.Scheme != "nats-route" || r.Port() != strconv.Itoa(o.Cluster.Port) {
					t.Errorf("route %s: want nats-route://<server>:%d", r, o.Cluster.Port)
				}
				hosts = append(hosts, r.Hostname())
			}
			if !slices.Equal(hosts, clusterNodes) {
				t.Errorf("routes to %v, want %v", hosts, clusterNodes)
			}
			checkAccounts(t, o, pw)
		})
	}
	t.Run("single node", func(t *testing.T) {
		o := loadNATS(t, "nats.conf")
		if !o.JetStream || o.StoreDir == "" {
			t.Errorf("JetStream %v, store_dir %q: plumb run --durable needs JetStream", o.JetStream, o.StoreDir)
		}
		if o.MaxPayload != 8<<20 {
			t.Errorf("max_payload %d, want 8 MB", o.MaxPayload)
		}
		// It serves plumb's layout, without authentication.
		forTest(t, o, 0, nil)
		s := start(t, o)
		nc, err := nats.Connect(s.ClientURL())
		if err != nil {
			t.Fatal(err)
		}
		defer nc.Close()
		js, err := jetstream.New(nc)
		if err != nil {
			t.Fatal(err)
		}
		ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
		defer cancel()
		if err := jet.Ensure(ctx, js, jet.Layout{}); err != nil {
			t.Errorf("ensure plumb's layout: %v", err)
		}
	})
}

// checkAccounts checks the accounts, users and passwords of a cluster server.
func checkAccounts(t *testing.T, o *server.Options, pw map[string]string) {
	t.Helper()
	if o.SystemAccount != "SYS" {
		t.Errorf("system_account %q, want SYS", o.SystemAccount)
	}
	wantAccount := map[string]string{"producer": "PLUMB", "worker": "PLUMB", "bot": "PLUMB", "sys": "SYS"}
	seen := map[string]bool{}
	for _, u := range o.Users {
		acc, ok := wantAccount[u.Username]
		if !ok {
			t.Errorf("unexpected user %q", u.Username)
			continue
		}
		seen[u.Username] = true
		if u.Account == nil || u.Account.Name != acc {
			t.Errorf("user %s not in account %s", u.Username, acc)
		}
		if want := pw[passwordVars[u.Username]]; u.Password != want {
			t.Errorf("user %s: password not read from $%s", u.Username, passwordVars[u.Username])
		}
		if acc != "PLUMB" {
			continue
		}
		p := u.Permissions
		if p == nil || p.Publish == nil || p.Subscribe == nil || len(p.Publish.Allow) == 0 || len(p.Subscribe.Allow) == 0 {
			t.Errorf("user %s: want publish and subscribe allow lists, have %+v", u.Username, p)
			continue
		}
		for _, s := range slices.Concat(p.Publish.Allow, p.Subscribe.Allow) {
			if !server.IsValidSubject(s) {
				t.Errorf("user %s: invalid subject %q", u.Username, s)
			}
		}
	}
	for u := range wantAccount {
		if !seen[u] {
			t.Errorf("user %s missing", u)
		}
	}
}

// TestClusterForms starts the three servers of cluster/ from their own
// configuration (addresses moved to loopback), checks that they form a
// JetStream cluster, and that the worker user lays plumb's streams and
// buckets out over it with three replicas.
func TestClusterForms(t *testing.T) {
	if testing.Short() {
		t.Skip("starts a 3-server cluster; skipped with -short")
	}
	pw := setPasswords(t)
	ports := make([]int, len(clusterNodes))
	routes := make([]*url.URL, len(clusterNodes))
	for i := range ports {
		// A free port, released just before the server takes it.
		l, err := net.Listen("tcp", "127.0.0.1:0")
		if err != nil {
			t.Fatal(err)
		}
		ports[i] = l.Addr().(*net.TCPAddr).Port
		l.Close()
		routes[i] = &url.URL{Scheme: "nats-route", Host: net.JoinHostPort("127.0.0.1", strconv.Itoa(ports[i]))}
	}
	opts := make([]*server.Options, len(clusterNodes))
	for i, name := range clusterNodes {
		opts[i] = loadNATS(t, "cluster/"+name+".conf")
		forTest(t, opts[i], ports[i], routes)
	}
	var (
		srvs []*server.Server
		urls []string
		mu   sync.Mutex
		wg   sync.WaitGroup
	)
	for _, o := range opts {
		wg.Add(1)
		go func() { // started together: each waits for its routes
			defer wg.Done()
			s, err := server.NewServer(o)
			if err != nil {
				t.Errorf("server %s: %v", o.ServerName, err)
				return
			}
			go s.Start()
			mu.Lock()
			srvs = append(srvs, s)
			mu.Unlock()
		}()
	}
	wg.Wait()
	t.Cleanup(func() {
		for _, s := range srvs {
			s.Shutdown()
			s.WaitForShutdown()
		}
	})
	if t.Failed() {
		t.FailNow()
	}
	for _, s := range srvs {
		if !s.ReadyForConnections(10 * time.Second) {
			t.Fatalf("server %s not ready after 10s", s.Name())
		}
		urls = append(urls, s.ClientURL())
	}
	deadline := time.Now().Add(30 * time.Second)
	for !slices.ContainsFunc(srvs, func(s *server.Server) bool {
		return s.JetStreamIsLeader() && len(s.JetStreamClusterPeers()) == len(srvs)
	}) {
		if time.Now().After(deadline) {
			t.Fatalf("no JetStream meta leader seeing %d peers after 30s", len(srvs))
		}
		time.Sleep(50 * time.Millisecond)
	}

	nc, errs := connectAs(t, strings.Join(urls, ","), "worker", pw)
	js, err := jetstream.New(nc)
	if err != nil {
		t.Fatal(err)
	}
	// Placing a replicated stream needs every peer's group to elect a
	// leader, which a loaded machine can make slow: Ensure is idempotent,
	// so it is tried again before giving up.
	ctx, cancel := context.WithTimeout(context.Background(), 90*time.Second)
	defer cancel()
	for try := 1; ; try++ {
		tctx, tcancel := context.WithTimeout(ctx, 30*time.Second)
		err := jet.Ensure(tctx, js, jet.Layout{Replicas: len(srvs)})
		tcancel()
		if err == nil {
			break
		}
		if try == 3 {
			t.Fatalf("worker: ensure with %d replicas (%d tries): %v", len(srvs), try, err)
		}
		t.Logf("ensure with %d replicas, try %d: %v", len(srvs), try, err)
	}
	for _, name := range []string{jet.InputStream, jet.BundleStream, "KV_" + jet.SnapshotBucket, "KV_" + jet.LeaseBucket} {
		s, err := js.Stream(ctx, name)
		if err != nil {
			t.Errorf("stream %s: %v", name, err)
			continue
		}
		if cl := s.CachedInfo().Cluster; cl == nil || cl.Name != "plumb" || len(cl.Replicas)+1 != len(srvs) {
			t.Errorf("stream %s: cluster %+v, want a leader and %d replicas in cluster plumb", name, cl, len(srvs)-1)
		}
	}
	errs.none(t)
}

// violations collects a connection's asynchronous errors.
type violations struct {
	user string
	ch   chan error
}

func (v *violations) handler(_ *nats.Conn, _ *nats.Subscription, err error) {
	select {
	case v.ch <- err:
	default: // full: the test fails on the ones it has
	}
}

// expect waits for the permissions violation the server reports for op
// ("publish" or "subscription") on subject.
func (v *violations) expect(t *testing.T, op, subject string) {
	t.Helper()
	want := strings.ToLower(fmt.Sprintf("%s to %q", op, subject))
	timeout := time.After(3 * time.Second)
	for {
		select {
		case err := <-v.ch:
			if errors.Is(err, nats.ErrPermissionViolation) && strings.Contains(strings.ToLower(err.Error()), want) {
				return
			}
			t.Errorf("%s: unexpected error %v while waiting for a violation of %s", v.user, err, want)
		case <-timeout:
			t.Errorf("%s: no permissions violation for %s after 3s: the server allowed it", v.user, want)
			return
		}
	}
}

// none fails the test for every error collected and not expected.
func (v *violations) none(t *testing.T) {
	t.Helper()
	for {
		select {
		case err := <-v.ch:
			t.Errorf("%s: unexpected error: %v", v.user, err)
		default:
			return
		}
	}
}

// connectAs connects to url as user with its test password; the connection
// is closed at the test's end.
func connectAs(t *testing.T, url, user string, pw map[string]string) (*nats.Conn, *violations) {
	t.Helper()
	v := &violations{user: user, ch: make(chan error, 64)}
	nc, err := nats.Connect(url, nats.UserInfo(user, pw[passwordVars[user]]), nats.Name("deploy-test-"+user),
		nats.CustomInboxPrefix("_INBOX_"+user), nats.ErrorHandler(v.handler))
	if err != nil {
		t.Fatalf("connect as %s: %v", user, err)
	}
	t.Cleanup(nc.Close)
	return nc, v
}

// TestPermissions runs a server with the accounts of cluster/accounts.conf
// (nats-1.conf without its cluster) and checks what each user may and may
// not do, with plumb's own JetStream code where it has some.
func TestPermissions(t *testing.T) {
	pw := setPasswords(t)
	o := loadNATS(t, "cluster/nats-1.conf")
	forTest(t, o, 0, nil)
	s := start(t, o)
	acc, err := s.LookupAccount("PLUMB")
	if err != nil || !acc.JetStreamEnabled() {
		t.Fatalf("account PLUMB: JetStream not enabled (%v)", err)
	}
	url := s.ClientURL()
	ctx, cancel := context.WithTimeout(context.Background(), 15*time.Second)
	defer cancel()
	short := func() (context.Context, context.CancelFunc) { return context.WithTimeout(ctx, 500*time.Millisecond) }

	if _, err := nats.Connect(url, nats.UserInfo("worker", "wrong")); err == nil {
		t.Error("worker connected with a wrong password")
	}
	if _, err := nats.Connect(url); err == nil {
		t.Error("connected without credentials")
	}

	wnc, wErrs := connectAs(t, url, "worker", pw)
	pnc, pErrs := connectAs(t, url, "producer", pw)
	bnc, bErrs := connectAs(t, url, "bot", pw)
	wjs, err := jetstream.New(wnc)
	if err != nil {
		t.Fatal(err)
	}
	pjs, err := jetstream.New(pnc)
	if err != nil {
		t.Fatal(err)
	}
	bjs, err := jetstream.New(bnc)
	if err != nil {
		t.Fatal(err)
	}

	const partitions = 4
	if err := jet.Ensure(ctx, wjs, jet.Layout{Partitions: partitions, LeaseTTL: time.Second}); err != nil {
		t.Fatalf("worker: ensure plumb's streams and buckets: %v", err)
	}

	// The bot listens to every output.
	out := make(chan *nats.Msg, 16)
	if _, err := bnc.ChanSubscribe("plumb.out.>", out); err != nil {
		t.Fatal(err)
	}
	if err := bnc.Flush(); err != nil {
		t.Fatal(err)
	}

	// A worker without --durable subscribes to the inputs.
	in := make(chan *nats.Msg, 16)
	if _, err := wnc.ChanSubscribe(stream.InputsWildcard, in); err != nil {
		t.Fatal(err)
	}
	if err := wnc.Flush(); err != nil {
		t.Fatal(err)
	}

	const site = "wind-test-1"
	t.Run("producer", func(t *testing.T) {
		at := time.Date(2026, 3, 2, 0, 0, 0, 0, time.UTC)
		ack, err := jet.PublishMeter(ctx, pjs, site, at, []byte(`{"readings":[]}`))
		if err != nil {
			t.Fatalf("producer: publish a meter reading with acknowledgement: %v", err)
		}
		if ack.Stream != jet.InputStream {
			t.Errorf("acknowledged by stream %q, want %s", ack.Stream, jet.InputStream)
		}
		if err := pnc.Publish(stream.WeatherSubject(site), []byte(`{}`)); err != nil {
			t.Fatal(err)
		}
		// Stream info of the input stream is allowed (plumb replay
		// --durable checks the stream exists); of any other stream not.
		if _, err := pjs.Stream(ctx, jet.InputStream); err != nil {
			t.Errorf("producer: input stream info: %v", err)
		}
		for _, subj := range []string{"plumb.out.quantiles.x", "plumb.in.other", "$KV.plumb_snapshots.x", "$JS.API.STREAM.INFO.PLUMB_BUNDLES"} {
			if err := pnc.Publish(subj, []byte("forged")); err != nil {
				t.Fatal(err)
			}
			pnc.Flush()
			pErrs.expect(t, "publish", subj)
		}
		if _, err := pnc.Subscribe("plumb.out.>", func(*nats.Msg) {}); err != nil {
			t.Fatal(err)
		}
		pnc.Flush()
		pErrs.expect(t, "subscription", "plumb.out.>")
		// Replies to other users (their inboxes) are out of reach.
		for _, subj := range []string{"_INBOX_worker.>", "_INBOX.>"} {
			if _, err := pnc.Subscribe(subj, func(*nats.Msg) {}); err != nil {
				t.Fatal(err)
			}
			pnc.Flush()
			pErrs.expect(t, "subscription", subj)
		}
		pErrs.none(t)
	})

	t.Run("worker", func(t *testing.T) {
		select {
		case m := <-in:
			if m.Subject != stream.MeterSubject(site) {
				t.Errorf("worker: input on %s, want the producer's first, on %s", m.Subject, stream.MeterSubject(site))
			}
		case <-time.After(3 * time.Second):
			t.Error("worker: received no input on its core subscription")
		}

		// Outputs reach the bot; the producer's forged bundle, published
		// before on a connection the server processed first, did not.
		bundle := []byte("bundle of " + site)
		if err := wnc.Publish(stream.QuantilesSubject(site), bundle); err != nil {
			t.Fatal(err)
		}
		wnc.Flush()
		for got := false; !got; {
			select {
			case m := <-out:
				if m.Subject == "plumb.out.quantiles.x" {
					t.Errorf("the bot received the producer's forged bundle")
				}
				got = m.Subject == stream.QuantilesSubject(site)
			case <-time.After(3 * time.Second):
				t.Fatal("the bot did not receive the worker's bundle")
			}
		}

		// The bundle stream captured it (the capture of a core publish
		// may land just after the subscriber got it: poll briefly).
		var held uint64
		for deadline := time.Now().Add(3 * time.Second); ; time.Sleep(20 * time.Millisecond) {
			bs, err := wjs.Stream(ctx, jet.BundleStream)
			if err != nil {
				t.Fatalf("worker: look up the bundle stream: %v", err)
			}
			if held = bs.CachedInfo().State.Msgs; held == 1 || time.Now().After(deadline) {
				break
			}
		}
		if held != 1 {
			t.Errorf("bundle stream holds %d messages, want the worker's 1", held)
		}

		// The partition's durable consumer: create, fetch, acknowledge.
		p, err := jet.PartitionOf(site, partitions)
		if err != nil {
			t.Fatal(err)
		}
		c, err := jet.PartitionConsumer(ctx, wjs, p, jet.ConsumerOptions{})
		if err != nil {
			t.Fatalf("worker: partition consumer: %v", err)
		}
		batch, err := c.Fetch(2, jetstream.FetchMaxWait(3*time.Second))
		if err != nil {
			t.Fatal(err)
		}
		n := 0
		for m := range batch.Messages() {
			if subj, _, err := jet.InputSubject(m.Subject()); err != nil || !strings.HasSuffix(subj, "."+site) {
				t.Errorf("fetched %s (%v), want an input of %s", m.Subject(), err, site)
			}
			if err := m.DoubleAck(ctx); err != nil {
				t.Errorf("worker: acknowledge: %v", err)
			}
			n++
		}
		if n != 2 || batch.Error() != nil {
			t.Errorf("fetched %d inputs (%v), want the producer's 2", n, batch.Error())
		}
		// Restart from a sequence: the consumer is deleted and created anew.
		if _, err := jet.PartitionConsumer(ctx, wjs, p, jet.ConsumerOptions{StartSeq: 2}); err != nil {
			t.Errorf("worker: partition consumer from sequence 2: %v", err)
		}
		// A consumer of one read of a durable worker (named for it),
		// and its deletion.
		oc, err := jet.PartitionConsumer(ctx, wjs, p, jet.ConsumerOptions{StartSeq: 1, Owner: "worker-1-1"})
		if err != nil {
			t.Errorf("worker: owned partition consumer: %v", err)
		} else if err := wjs.DeleteConsumer(ctx, jet.InputStream, oc.CachedInfo().Name); err != nil {
			t.Errorf("worker: delete its consumer: %v", err)
		}

		// Snapshots of a few MB in the KV bucket, read back and watched
		// (enough bytes for the server to ask for flow control).
		kv, err := wjs.KeyValue(ctx, jet.SnapshotBucket)
		if err != nil {
			t.Fatal(err)
		}
		snap := bytes.Repeat([]byte("snapshot"), 3<<20/8)
		const snaps = 4
		for i := range snaps {
			if _, err := kv.Put(ctx, site+"-"+strconv.Itoa(i), snap); err != nil {
				t.Fatalf("worker: put a 3 MB snapshot: %v", err)
			}
		}
		if e, err := kv.Get(ctx, site+"-0"); err != nil || !bytes.Equal(e.Value(), snap) {
			t.Errorf("worker: get the snapshot: %v", err)
		}
		// The read from the stream leader a worker restores from, and
		// the compare-and-set it writes with.
		v, err := jet.Latest(ctx, wjs, jet.SnapshotBucket, site+"-0")
		if err != nil || !bytes.Equal(v.Data, snap) {
			t.Errorf("worker: read the snapshot from the leader: %v", err)
		} else if _, err := kv.Update(ctx, site+"-0", snap, v.Revision); err != nil {
			t.Errorf("worker: update the snapshot at its revision: %v", err)
		}
		w, err := kv.WatchAll(ctx, jetstream.IgnoreDeletes())
		if err != nil {
			t.Fatal(err)
		}
		for got := 0; got < snaps; {
			select {
			case e := <-w.Updates():
				if e != nil {
					got++
				}
			case <-time.After(3 * time.Second):
				t.Fatalf("worker: watch gave %d snapshots, want %d", got, snaps)
			}
		}
		w.Stop()
		if keys, err := kv.ListKeys(ctx); err != nil {
			t.Errorf("worker: list keys: %v", err)
		} else {
			for range keys.Keys() {
			}
		}

		// Snapshots in an object store bucket of the same name.
		obs, err := wjs.CreateOrUpdateObjectStore(ctx, jetstream.ObjectStoreConfig{Bucket: jet.SnapshotBucket})
		if err != nil {
			t.Fatalf("worker: object store %s: %v", jet.SnapshotBucket, err)
		}
		for range 2 { // the second put replaces the object
			if _, err := obs.PutBytes(ctx, site, snap); err != nil {
				t.Fatalf("worker: put object: %v", err)
			}
		}
		if obs, err = wjs.ObjectStore(ctx, jet.SnapshotBucket); err != nil {
			t.Fatalf("worker: look up object store %s: %v", jet.SnapshotBucket, err)
		}
		if got, err := obs.GetBytes(ctx, site); err != nil || !bytes.Equal(got, snap) {
			t.Errorf("worker: get object: %v", err)
		}

		// Partition leases: one worker alone takes every partition.
		lkv, err := wjs.KeyValue(ctx, jet.LeaseBucket)
		if err != nil {
			t.Fatal(err)
		}
		m, err := lease.New(lkv, "worker-1", partitions, lease.Options{})
		if err != nil {
			t.Fatal(err)
		}
		lctx, lcancel := context.WithCancel(ctx)
		done := make(chan error, 1)
		go func() { done <- m.Run(lctx) }()
		for deadline := time.Now().Add(5 * time.Second); len(m.Owned()) < partitions && time.Now().Before(deadline); {
			time.Sleep(20 * time.Millisecond)
		}
		if got := m.Owned(); len(got) != partitions {
			t.Errorf("worker: owns partitions %v, want all %d", got, partitions)
		}
		lcancel()
		if err := <-done; err != nil {
			t.Errorf("worker: lease manager: %v", err)
		}
		// Released: the lease is gone (a refused read would time out).
		if _, err := lkv.Get(ctx, "lease.0"); !errors.Is(err, jetstream.ErrKeyNotFound) {
			t.Errorf("worker: read a released lease: %v, want %v", err, jetstream.ErrKeyNotFound)
		}

		// Not a producer.
		if err := wnc.Publish(stream.MeterSubject(site), []byte("{}")); err != nil {
			t.Fatal(err)
		}
		wnc.Flush()
		wErrs.expect(t, "publish", stream.MeterSubject(site))
		wErrs.none(t)
	})

	t.Run("bot", func(t *testing.T) {
		// The latest bundle of a site from the bundle stream.
		bundles, err := bjs.Stream(ctx, jet.BundleStream)
		if err != nil {
			t.Fatalf("bot: bundle stream: %v", err)
		}
		m, err := bundles.GetLastMsgForSubject(ctx, stream.QuantilesSubject(site))
		if err != nil || string(m.Data) != "bundle of "+site {
			t.Fatalf("bot: latest bundle of %s: %v", site, err)
		}
		if bySeq, err := bundles.GetMsg(ctx, m.Sequence); err != nil || string(bySeq.Data) != string(m.Data) {
			t.Errorf("bot: bundle by sequence %d: %v", m.Sequence, err)
		}
		for _, subj := range []string{stream.MeterSubject(site), stream.QuantilesSubject(site), "$KV.plumb_snapshots." + site} {
			if err := bnc.Publish(subj, []byte("forged")); err != nil {
				t.Fatal(err)
			}
			bnc.Flush()
			bErrs.expect(t, "publish", subj)
		}
		// No reading of snapshots, no consumers (see accounts.conf).
		c1, cancel1 := short()
		defer cancel1()
		if _, err := bjs.KeyValue(c1, jet.SnapshotBucket); err == nil {
			t.Error("bot: looked up the snapshot bucket")
		}
		bErrs.expect(t, "publish", "$JS.API.STREAM.INFO.KV_"+jet.SnapshotBucket)
		// Nor the workers' replies (their pull deliveries carry inputs).
		if _, err := bnc.Subscribe("_INBOX_worker.>", func(*nats.Msg) {}); err != nil {
			t.Fatal(err)
		}
		bnc.Flush()
		bErrs.expect(t, "subscription", "_INBOX_worker.>")
		c2, cancel2 := short()
		defer cancel2()
		if _, err := bundles.CreateConsumer(c2, jetstream.ConsumerConfig{}); err == nil {
			t.Error("bot: created a consumer on the bundle stream")
		}
		select {
		case err := <-bErrs.ch:
			if !errors.Is(err, nats.ErrPermissionViolation) || !strings.Contains(err.Error(), "$JS.API.CONSUMER.CREATE."+jet.BundleStream) {
				t.Errorf("bot: consumer create: %v, want a permissions violation", err)
			}
		case <-time.After(3 * time.Second):
			t.Error("bot: no permissions violation for a consumer create")
		}
		bErrs.none(t)
	})
}
