package stream

import (
	"context"
	"fmt"
	"math"
	"time"

	"github.com/nats-io/nats.go"

	"github.com/plumb-forecast/plumb/stream/history"
)

// ReplayOptions configures Replay. Zero fields take the documented defaults.
type ReplayOptions struct {
	// Speed is how many seconds of event time pass per second of wall time;
	// 0 means as fast as possible.
	Speed float64
	// Progress, if set, is called after each published event with the count
	// done, the total and the event's time.
	Progress func(done, total int, at time.Time)
	// FlushEvery is how many messages go out between round trips to the
	// server (a round trip bounds how far the publisher runs ahead); 0 means 1000.
	FlushEvery int
	// Now and Sleep give wall time for pacing; nil means the real clock.
	Now   func() time.Time
	Sleep func(ctx context.Context, d time.Duration) error
	// Publisher, if set, sends the messages instead of core NATS (e.g.
	// jet.ReplayPublisher: to the input stream, with message ids).
	Publisher Publisher
}

// Publisher sends the inputs of a replay.
type Publisher interface {
	// Publish sends one encoded input of ev on subject; data is only valid
	// during the call.
	Publish(ev *history.Event, subject string, data []byte) error
	// Flush waits until everything published so far is stored.
	Flush(ctx context.Context) error
}

// ReplayStats counts what Replay published.
type ReplayStats struct {
	Runs, Readings int
	// Missing counts readings without a value (gaps), not published.
	Missing     int
	Bytes       int64
	First, Last time.Time // event time
}

// Replay publishes events (from history.History.Events) on the input
// subjects in order: each weather run as one message at its issue time,
// each reading as one message at its interval's end. With a Speed it
// sleeps so that event time advances Speed times faster than wall time.
func Replay(ctx context.Context, nc *nats.Conn, events []history.Event, o ReplayOptions) (ReplayStats, error) {
	if o.FlushEvery <= 0 {
		o.FlushEvery = 1000
	}
	if o.Now == nil {
		o.Now = time.Now
	}
	if o.Sleep == nil {
		o.Sleep = func(ctx context.Context, d time.Duration) error {
			t := time.NewTimer(d)
			defer t.Stop()
			select {
			case <-t.C:
				return nil
			case <-ctx.Done():
				return ctx.Err()
			}
		}
	}
	var st ReplayStats
	if len(events) == 0 {
		return st, nil
	}
	st.First = events[0].Time
	wall0 := o.Now()
	var buf []byte
	for i, ev := range events {
		if err := ctx.Err(); err != nil {
			return st, err
		}
		if o.Speed > 0 {
			due := wall0.Add(time.Duration(float64(ev.Time.Sub(st.First)) / o.Speed))
			if d := due.Sub(o.Now()); d > 0 {
				if err := o.Sleep(ctx, d); err != nil {
					return st, err
				}
			}
		}
		var subj string
		switch {
		case ev.Run != nil:
			subj = WeatherSubject(ev.Run.Site)
			buf = AppendWeatherJSON(buf[:0], ev.Run)
			st.Runs++
		case ev.Reading != nil && math.IsNaN(ev.Reading.PowerMW):
			st.Missing++ // a gap in the meter record: nothing to publish
			continue
		case ev.Reading != nil:
			subj = MeterSubject(ev.Reading.Site)
			buf = AppendMeterJSON(buf[:0], ev.Reading)
			st.Readings++
		default:
			continue
		}
		var err error
		if o.Publisher != nil {
			err = o.Publisher.Publish(&events[i], subj, buf)
		} else {
			err = nc.Publish(subj, buf)
		}
		if err != nil {
			return st, fmt.Errorf("replay: publish %s: %w", subj, err)
		}
		st.Bytes += int64(len(buf))
		st.Last = ev.Time
		if (i+1)%o.FlushEvery == 0 {
			if err := flushAll(ctx, nc, o.Publisher); err != nil {
				return st, err
			}
		}
		if o.Progress != nil {
			o.Progress(i+1, len(events), ev.Time)
		}
	}
	return st, flushAll(ctx, nc, o.Publisher)
}

func flushAll(ctx context.Context, nc *nats.Conn, p Publisher) error {
	if p != nil {
		ctx, cancel := context.WithTimeout(ctx, time.Minute)
		defer cancel()
		if err := p.Flush(ctx); err != nil {
			return fmt.Errorf("replay: flush: %w", err)
		}
		return nil
	}
	return flush(ctx, nc)
}

// flush waits for the server to have every message published so far.
func flush(ctx context.Context, nc *nats.Conn) error {
	ctx, cancel := context.WithTimeout(ctx, time.Minute)
	defer cancel()
	if err := nc.FlushWithContext(ctx); err != nil {
		return fmt.Errorf("replay: flush: %w", err)
	}
	return nil
}
