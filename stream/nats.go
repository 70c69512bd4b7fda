package stream

import (
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
)

// EmbeddedOptions configures the NATS server plumb starts in-process when no
// server URL is given.
type EmbeddedOptions struct {
	// Host to listen on; "" means 127.0.0.1 (loopback only).
	Host string
	// Port to listen on; 0 means 4222, -1 means any free port.
	Port int
	// StoreDir holds JetStream's data; "" means a fresh temporary folder that
	// Shutdown removes.
	StoreDir string
	// Debug turns on the server's own logging to stderr.
	Debug bool
}

// Embedded is an in-process NATS server with JetStream.
type Embedded struct {
	srv     *server.Server
	tempDir string
}

// StartEmbedded starts a NATS server with JetStream in this process and waits
// until it accepts connections.
func StartEmbedded(o EmbeddedOptions) (*Embedded, error) {
	host := o.Host
	if host == "" {
		host = "127.0.0.1"
	}
	port := o.Port
	if port == 0 {
		port = 4222
	}
	e := &Embedded{}
	dir := o.StoreDir
	if dir == "" {
		tmp, err := os.MkdirTemp("", "plumb-nats-")
		if err != nil {
			return nil, fmt.Errorf("embedded nats: %w", err)
		}
		dir, e.tempDir = tmp, tmp
	} else if err := os.MkdirAll(dir, 0o755); err != nil {
		return nil, fmt.Errorf("embedded nats: store dir: %w", err)
	}
	opts := &server.Options{
		ServerName: "plumb-embedded",
		Host:       host,
		Port:       port,
		JetStream:  true,
		StoreDir:   filepath.Clean(dir),
		NoSigs:     true,
		NoLog:      !o.Debug,
		// Weather runs for many sites can be large messages.
		MaxPayload: 8 << 20,
	}
	srv, err := server.NewServer(opts)
	if err != nil {
		e.cleanup()
		return nil, fmt.Errorf("embedded nats: %w", err)
	}
	if o.Debug {
		srv.ConfigureLogger()
	}
	e.srv = srv
	go srv.Start()
	if !srv.ReadyForConnections(10 * time.Second) {
		srv.Shutdown()
		e.cleanup()
		return nil, fmt.Errorf("embedded nats: not ready after 10s (is %s:%d free?)", host, port)
	}
	return e, nil
}

// URL returns the client URL other processes can connect to.
func (e *Embedded) URL() string { return e.srv.ClientURL() }

// Server returns the underlying server (for in-process connections and tests).
func (e *Embedded) Server() *server.Server { return e.srv }

// Shutdown stops the server and waits for it; it is safe to call twice.
func (e *Embedded) Shutdown() {
	if e == nil || e.srv == nil {
		return
	}
	e.srv.Shutdown()
	e.srv.WaitForShutdown()
	e.cleanup()
}

func (e *Embedded) cleanup() {
	if e.tempDir != "" {
		os.RemoveAll(e.tempDir)
		e.tempDir = ""
	}
}

// ConnOptions says how to reach a NATS server or cluster. Zero fields are
// unused; at most one of User/Password, Token, NKeyFile and CredsFile should be set.
type ConnOptions struct {
	// URL is a comma-separated list of server URLs.
	URL string
	// Name is the connection name shown by the server's monitoring.
	Name string
	// User and Password for user/password authentication.
	User, Password string
	// Token for token authentication.
	Token string
	// NKeyFile is a file holding an NKey seed.
	NKeyFile string
	// CredsFile is a user credentials file (JWT and NKey seed).
	CredsFile string
	// TLSCA, TLSCert and TLSKey are PEM files: the CA to trust, and a client
	// certificate and key for mutual TLS.
	TLSCA, TLSCert, TLSKey string
	// InboxPrefix, if not empty, replaces _INBOX as the subject prefix of
	// the connection's reply inboxes (request replies, JetStream API
	// answers, pull deliveries, watches). Servers that give each user
	// subscribe rights on its own prefix only (deploy/cluster/accounts.conf)
	// keep users from reading each other's replies.
	InboxPrefix string
	// OnEvent, if set, is told about disconnects, reconnects and async errors.
	OnEvent func(msg string, err error)
}

// ErrNoURL is returned by Connect when no URL is given.
var ErrNoURL = errors.New("stream: no NATS URL")

// Connect opens a connection that reconnects forever (a worker rides through
// a server restart) and buffers publishes while disconnected.
func Connect(o ConnOptions) (*nats.Conn, error) {
	if o.URL == "" {
		return nil, ErrNoURL
	}
	opts := []nats.Option{
		nats.Name(o.Name),
		nats.MaxReconnects(-1),
		nats.ReconnectWait(250 * time.Millisecond),
		nats.ReconnectBufSize(64 << 20),
	}
	if o.User != "" {
		opts = append(opts, nats.UserInfo(o.User, o.Password))
	}
	if o.InboxPrefix != "" {
		opts = append(opts, nats.CustomInboxPrefix(o.InboxPrefix))
	}
	if o.Token != "" {
		opts = append(opts, nats.Token(o.Token))
	}
	if o.NKeyFile != "" {
		opt, err := nats.NkeyOptionFromSeed(o.NKeyFile)
		if err != nil {
			return nil, fmt.Errorf("stream: nkey: %w", err)
		}
		opts = append(opts, opt)
	}
	if o.CredsFile != "" {
		opts = append(opts, nats.UserCredentials(o.CredsFile))
	}
	if o.TLSCA != "" {
		opts = append(opts, nats.RootCAs(o.TLSCA))
	}
	if o.TLSCert != "" || o.TLSKey != "" {
		opts = append(opts, nats.ClientCert(o.TLSCert, o.TLSKey))
	}
	if ev := o.OnEvent; ev != nil {
		opts = append(opts,
			nats.DisconnectErrHandler(func(_ *nats.Conn, err error) { ev("disconnected", err) }),
			nats.ReconnectHandler(func(nc *nats.Conn) { ev("reconnected to "+nc.ConnectedUrlRedacted(), nil) }),
			nats.ErrorHandler(func(_ *nats.Conn, sub *nats.Subscription, err error) {
				subj := ""
				if sub != nil {
					subj = sub.Subject
				}
				ev("async error on "+subj, err)
			}),
		)
	}
	nc, err := nats.Connect(o.URL, opts...)
	if err != nil {
		return nil, fmt.Errorf("stream: connect %s: %w", o.URL, err)
	}
	return nc, nil
}
