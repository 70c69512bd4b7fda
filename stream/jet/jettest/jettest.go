// Package jettest starts JetStream servers for tests: one embedded server, or
// a cluster of servers routed to each other on loopback, all in the test's
// process, on free ports, with their store folders in the test's temporary
// folder. Everything it starts is stopped by the test's cleanup.
package jettest

import (
	"fmt"
	"net"
	"net/url"
	"path/filepath"
	"strconv"
	"testing"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"

	"github.com/plumb-forecast/plumb/stream"
)

// Server starts one embedded NATS server with JetStream (stream.StartEmbedded)
// on a free loopback port and returns its URL.
func Server(t testing.TB) string {
	t.Helper()
	e, err := stream.StartEmbedded(stream.EmbeddedOptions{Port: -1, StoreDir: t.TempDir()})
	if err != nil {
		t.Fatalf("jettest: %v", err)
	}
	t.Cleanup(e.Shutdown)
	return e.URL()
}

// Cluster starts n NATS servers with JetStream, routed to each other on
// loopback as one cluster, waits until they have elected a JetStream meta
// leader that sees all n peers, and returns their client URLs.
func Cluster(t testing.TB, n int) []string {
	t.Helper()
	if n < 1 {
		panic("jettest: cluster of " + strconv.Itoa(n) + " servers")
	}
	ports := make([]int, n)
	routes := make([]*url.URL, n)
	for i := range ports {
		// A free port, released just before the server takes it; another
		// process taking it in between fails the test loudly.
		l, err := net.Listen("tcp", "127.0.0.1:0")
		if err != nil {
			t.Fatalf("jettest: free port: %v", err)
		}
		ports[i] = l.Addr().(*net.TCPAddr).Port
		l.Close()
		routes[i] = &url.URL{Scheme: "nats-route", Host: net.JoinHostPort("127.0.0.1", strconv.Itoa(ports[i]))}
	}
	dir := t.TempDir()
	srvs := make([]*server.Server, n)
	urls := make([]string, n)
	for i := range srvs {
		opts := &server.Options{
			ServerName: fmt.Sprintf("plumb-test-%d", i),
			Host:       "127.0.0.1",
			Port:       -1,
			NoLog:      true,
			NoSigs:     true,
			JetStream:  true,
			StoreDir:   filepath.Join(dir, strconv.Itoa(i)),
			Cluster: server.ClusterOpts{
				Name: "plumb-test",
				Host: "127.0.0.1",
				Port: ports[i],
			},
			Routes: routes,
		}
		s, err := server.NewServer(opts)
		if err != nil {
			t.Fatalf("jettest: server %d: %v", i, err)
		}
		srvs[i] = s
		t.Cleanup(func() {
			s.Shutdown()
			s.WaitForShutdown()
		})
		go s.Start()
	}
	for i, s := range srvs {
		if !s.ReadyForConnections(10 * time.Second) {
			t.Fatalf("jettest: server %d not ready after 10s", i)
		}
		urls[i] = s.ClientURL()
	}
	deadline := time.Now().Add(30 * time.Second)
	for {
		ready := false
		for _, s := range srvs {
			if s.JetStreamIsLeader() && len(s.JetStreamClusterPeers()) == n {
				ready = true
			}
		}
		if ready {
			return urls
		}
		if time.Now().After(deadline) {
			t.Fatalf("jettest: no JetStream meta leader seeing %d peers after 30s", n)
		}
		time.Sleep(50 * time.Millisecond)
	}
}

// Connect connects to url (a comma-separated list is fine) and returns the
// connection and its JetStream context; the connection is closed by the
// test's cleanup.
func Connect(t testing.TB, url string) (*nats.Conn, jetstream.JetStream) {
	t.Helper()
	nc, err := stream.Connect(stream.ConnOptions{URL: url, Name: t.Name()})
	if err != nil {
		t.Fatalf("jettest: %v", err)
	}
	t.Cleanup(nc.Close)
	js, err := jetstream.New(nc)
	if err != nil {
		t.Fatalf("jettest: %v", err)
	}
	return nc, js
}
