package main

import (
	"flag"
	"fmt"
	"os"

	"github.com/nats-io/nats.go"
	"go.uber.org/zap"
	"go.uber.org/zap/zapcore"

	"github.com/plumb-forecast/plumb/stream"
)

const defaultURL = "nats://127.0.0.1:4222"

// connFlags are the NATS connection flags every command shares.
type connFlags struct {
	o stream.ConnOptions
}

func (c *connFlags) register(fs *flag.FlagSet, defURL, urlHelp string) {
	fs.StringVar(&c.o.URL, "nats", defURL, urlHelp)
	fs.StringVar(&c.o.CredsFile, "creds", "", "NATS user credentials `file` (JWT and NKey seed)")
	fs.StringVar(&c.o.NKeyFile, "nkey", "", "`file` holding an NKey seed")
	fs.StringVar(&c.o.User, "user", "", "NATS user name")
	fs.StringVar(&c.o.Password, "password", os.Getenv("PLUMB_NATS_PASSWORD"), "NATS password (default from $PLUMB_NATS_PASSWORD)")
	fs.StringVar(&c.o.Token, "token", os.Getenv("PLUMB_NATS_TOKEN"), "NATS token (default from $PLUMB_NATS_TOKEN)")
	fs.StringVar(&c.o.TLSCA, "tls-ca", "", "PEM `file` of the CA to trust for TLS")
	fs.StringVar(&c.o.TLSCert, "tls-cert", "", "PEM client certificate `file` for mutual TLS")
	fs.StringVar(&c.o.TLSKey, "tls-key", "", "PEM client key `file` for mutual TLS")
	fs.StringVar(&c.o.InboxPrefix, "inbox-prefix", "", "subject `prefix` of this connection's reply inboxes instead of _INBOX; on servers that let each user read replies under its own prefix only (deploy/cluster/accounts.conf: _INBOX_<user>)")
}

func (c *connFlags) connect(name string, log *zap.Logger) (*nats.Conn, error) {
	o := c.o
	o.Name = name
	if log != nil {
		o.OnEvent = func(msg string, err error) {
			if err != nil {
				log.Warn("nats: "+msg, zap.Error(err))
			} else {
				log.Info("nats: " + msg)
			}
		}
	}
	nc, err := stream.Connect(o)
	if err != nil {
		return nil, fmt.Errorf("%w (is a worker or NATS server running there? start one with 'plumb run')", err)
	}
	return nc, nil
}

// newLogger returns a console logger for people, or JSON lines for machines.
func newLogger(format, level string, stderr zapcore.WriteSyncer) (*zap.Logger, error) {
	lvl, err := zapcore.ParseLevel(level)
	if err != nil {
		return nil, fmt.Errorf("log level: %w", err)
	}
	var enc zapcore.Encoder
	switch format {
	case "console":
		cfg := zap.NewDevelopmentEncoderConfig()
		cfg.EncodeLevel = zapcore.CapitalLevelEncoder
		enc = zapcore.NewConsoleEncoder(cfg)
	case "json":
		enc = zapcore.NewJSONEncoder(zap.NewProductionEncoderConfig())
	default:
		return nil, fmt.Errorf("log format %q: use console or json", format)
	}
	return zap.New(zapcore.NewCore(enc, stderr, lvl)), nil
}
