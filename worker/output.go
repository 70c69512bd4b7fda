package worker

import (
	"bytes"
	"encoding/json"
	"fmt"
	"sync"

	"github.com/nats-io/nats.go"

	"github.com/plumb-forecast/plumb/conformal"
	"github.com/plumb-forecast/plumb/model"
	"github.com/plumb-forecast/plumb/stream"
)

// NATSOutput publishes bundles (Arrow IPC), alarms and rejects (JSON) on
// their subjects. It is safe for concurrent use.
type NATSOutput struct {
	nc   *nats.Conn
	encs sync.Pool // *bundleBuf
}

type bundleBuf struct {
	enc *stream.BundleEncoder
	buf bytes.Buffer
}

// NewNATSOutput returns an Output publishing on nc.
func NewNATSOutput(nc *nats.Conn) *NATSOutput {
	o := &NATSOutput{nc: nc}
	o.encs.New = func() any { return &bundleBuf{enc: stream.NewBundleEncoder()} }
	return o
}

// Bundle implements Output.
func (o *NATSOutput) Bundle(b *model.Bundle) error {
	bb := o.encs.Get().(*bundleBuf)
	defer o.encs.Put(bb)
	bb.buf.Reset()
	if err := bb.enc.Encode(&bb.buf, b); err != nil {
		return fmt.Errorf("worker: encode bundle of %s: %w", b.Site, err)
	}
	return o.nc.Publish(stream.QuantilesSubject(b.Site), bb.buf.Bytes())
}

// Alarm implements Output.
func (o *NATSOutput) Alarm(e conformal.Event) error {
	data, err := json.Marshal(e)
	if err != nil {
		return fmt.Errorf("worker: alarm: %w", err)
	}
	return o.nc.Publish(stream.AlarmsSubject(e.Site), data)
}

// Reject implements Output.
func (o *NATSOutput) Reject(r stream.Reject) error {
	data, err := json.Marshal(r)
	if err != nil {
		return fmt.Errorf("worker: reject: %w", err)
	}
	return o.nc.Publish(stream.RejectsSubject, data)
}
