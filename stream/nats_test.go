package stream_test

import (
	"strings"
	"testing"

	"github.com/nats-io/nats.go"

	"github.com/plumb-forecast/plumb/stream"
)

// TestConnectInboxPrefix: a connection made with an inbox prefix takes its
// reply inboxes under it (what per-user subscribe permissions allow), and
// one without takes them under _INBOX.
func TestConnectInboxPrefix(t *testing.T) {
	emb, err := stream.StartEmbedded(stream.EmbeddedOptions{Port: -1})
	if err != nil {
		t.Fatal(err)
	}
	defer emb.Shutdown()
	for _, tt := range []struct{ prefix, want string }{{"_INBOX_worker", "_INBOX_worker."}, {"", "_INBOX."}} {
		nc, err := stream.Connect(stream.ConnOptions{URL: emb.URL(), InboxPrefix: tt.prefix})
		if err != nil {
			t.Fatal(err)
		}
		if got := nc.NewInbox(); !strings.HasPrefix(got, tt.want) {
			t.Errorf("prefix %q: inbox %q, want it under %q", tt.prefix, got, tt.want)
		}
		// A request round trip through the prefixed inbox.
		sub, err := nc.Subscribe("echo", func(m *nats.Msg) { _ = m.Respond(m.Data) })
		if err != nil {
			t.Fatal(err)
		}
		if r, err := nc.Request("echo", []byte("x"), 2e9); err != nil || string(r.Data) != "x" {
			t.Errorf("prefix %q: request: %v", tt.prefix, err)
		}
		_ = sub.Unsubscribe()
		nc.Close()
	}
}
