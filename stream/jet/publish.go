package jet

import (
	"bytes"
	"context"
	"fmt"
	"net/url"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"

	"github.com/plumb-forecast/plumb/model"
	"github.com/plumb-forecast/plumb/stream"
	"github.com/plumb-forecast/plumb/stream/history"
)

// WeatherMsgID returns the message id (Nats-Msg-Id) of a weather run: a run
// is identified by its site, issue time and source (model.WeatherRun), so two
// publishes of one run inside the duplicate window keep only the first. The
// issue time is written in UTC, so the zone it was given in does not matter;
// the source is escaped so that any text makes a valid header value.
func WeatherMsgID(site string, issuedAt time.Time, source string) string {
	return "weather/" + site + "/" + issuedAt.UTC().Format(time.RFC3339Nano) + "/" + url.PathEscape(source)
}

// MeterMsgID returns the message id of a meter reading, identified by its
// site and interval start. A batch of readings should be identified by the
// reading it starts with and published once.
func MeterMsgID(site string, intervalStart time.Time) string {
	return "meter/" + site + "/" + intervalStart.UTC().Format(time.RFC3339Nano)
}

// PublishWeather publishes an encoded weather run of site on its input
// subject, with the run's message id, and waits for the input stream's
// acknowledgement. A run the stream already holds from inside the duplicate
// window is not stored again; the returned ack then has Duplicate set. It
// returns ErrBadSite for an invalid site id.
func PublishWeather(ctx context.Context, js jetstream.JetStream, site string, issuedAt time.Time, source string, data []byte) (*jetstream.PubAck, error) {
	if !model.ValidID(site) {
		return nil, fmt.Errorf("%w: %q", ErrBadSite, site)
	}
	return publish(ctx, js, stream.WeatherSubject(site), WeatherMsgID(site, issuedAt, source), data)
}

// PublishMeter publishes encoded meter readings of site whose (first)
// interval starts at intervalStart, like PublishWeather.
func PublishMeter(ctx context.Context, js jetstream.JetStream, site string, intervalStart time.Time, data []byte) (*jetstream.PubAck, error) {
	if !model.ValidID(site) {
		return nil, fmt.Errorf("%w: %q", ErrBadSite, site)
	}
	return publish(ctx, js, stream.MeterSubject(site), MeterMsgID(site, intervalStart), data)
}

func publish(ctx context.Context, js jetstream.JetStream, subject, id string, data []byte) (*jetstream.PubAck, error) {
	ack, err := js.Publish(ctx, subject, data, jetstream.WithMsgID(id), jetstream.WithExpectStream(InputStream))
	if err != nil {
		return nil, fmt.Errorf("jet: publish %s: %w", subject, err)
	}
	return ack, nil
}

// ReplayPublisher sends a replay's inputs (stream.ReplayOptions.Publisher)
// to the input stream asynchronously, each with its message id, so a
// replay run twice stores each input once (inside the duplicate window).
type ReplayPublisher struct {
	js      jetstream.JetStream
	pending []jetstream.PubAckFuture
}

// NewReplayPublisher returns a ReplayPublisher on js.
func NewReplayPublisher(js jetstream.JetStream) *ReplayPublisher { return &ReplayPublisher{js: js} }

// Publish implements stream.Publisher.
func (p *ReplayPublisher) Publish(ev *history.Event, subject string, data []byte) error {
	var id string
	switch {
	case ev.Run != nil:
		id = WeatherMsgID(ev.Run.Site, ev.Run.IssuedAt, ev.Run.Source)
	case ev.Reading != nil:
		id = MeterMsgID(ev.Reading.Site, ev.Reading.IntervalStart)
	}
	msg := &nats.Msg{Subject: subject, Data: bytes.Clone(data), Header: nats.Header{}}
	f, err := p.js.PublishMsgAsync(msg, jetstream.WithMsgID(id), jetstream.WithExpectStream(InputStream))
	if err != nil {
		return fmt.Errorf("jet: publish %s: %w", subject, err)
	}
	p.pending = append(p.pending, f)
	return nil
}

// Flush implements stream.Publisher: it waits for every acknowledgement.
// A publish the stream refused is an error.
func (p *ReplayPublisher) Flush(ctx context.Context) error {
	defer func() { p.pending = p.pending[:0] }()
	for _, f := range p.pending {
		select {
		case <-f.Ok():
		case err := <-f.Err():
			return fmt.Errorf("jet: publish %s: %w", f.Msg().Subject, err)
		case <-ctx.Done():
			return fmt.Errorf("jet: %d publishes unacknowledged: %w", p.js.PublishAsyncPending(), ctx.Err())
		}
	}
	return nil
}
