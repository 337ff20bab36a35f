package rig

import (
	"context"
	"fmt"
	"sync/atomic"
	"time"

	mqtt "github.com/eclipse/paho.mqtt.golang"

	"holomix/internal/testenv"
)

// Publisher publishes at QoS 1 with a window of outstanding messages and
// retries every publish the broker does not acknowledge (error, or no
// PUBACK within AckTimeout) until it does. It counts acknowledged publishes.
type Publisher struct {
	c mqtt.Client
	// Acked counts publishes the broker acknowledged; Tries every attempt.
	Acked, Tries atomic.Int64
	// AckTimeout is how long a publish may wait for its PUBACK before it is
	// sent again (default 3 s).
	AckTimeout time.Duration
}

// NewPublisher connects a publisher (clean session, automatic reconnection).
func NewPublisher(broker, clientID string) (*Publisher, error) {
	c := mqtt.NewClient(mqtt.NewClientOptions().AddBroker(broker).SetClientID(clientID).SetCleanSession(true).SetStore(testenv.PublisherStore()).
		SetAutoReconnect(true).SetConnectRetry(true).SetConnectRetryInterval(100 * time.Millisecond).
		SetMaxReconnectInterval(500 * time.Millisecond).SetWriteTimeout(5 * time.Second))
	tok := c.Connect()
	if !tok.WaitTimeout(15 * time.Second) {
		c.Disconnect(0)
		return nil, fmt.Errorf("publisher %s: no connection within 15 s", clientID)
	}
	if err := tok.Error(); err != nil {
		c.Disconnect(0)
		return nil, fmt.Errorf("publisher %s: connect: %w", clientID, err)
	}
	return &Publisher{c: c, AckTimeout: 3 * time.Second}, nil
}

// Close disconnects.
func (p *Publisher) Close() { p.c.Disconnect(100) }

// PublishOptions tune Publish.
type PublishOptions struct {
	// Window is the number of publishes outstanding at once (default 200).
	Window int
	// Rate paces the first sends at this many messages per second (0: as fast
	// as the window allows).
	Rate float64
	// OnSend, when set, is called just before a message is sent the first time.
	OnSend func(i int, at time.Time)
}

// Publish sends msgs in order and returns when the broker acknowledged every
// one, or with ctx's error.
func (p *Publisher) Publish(ctx context.Context, msgs []Msg, o PublishOptions) error {
	window := o.Window
	if window <= 0 {
		window = 200
	}
	type pending struct {
		i   int
		tok mqtt.Token
		at  time.Time
	}
	q := make([]pending, 0, window)
	var retry []int
	next := 0
	start := time.Now()
	for next < len(msgs) || len(q) > 0 || len(retry) > 0 {
		if err := ctx.Err(); err != nil {
			return err
		}
		for len(q) < window && (len(retry) > 0 || next < len(msgs)) {
			var i int
			if len(retry) > 0 {
				i, retry = retry[0], retry[1:]
			} else {
				if o.Rate > 0 {
					due := start.Add(time.Duration(float64(next) / o.Rate * float64(time.Second)))
					if w := time.Until(due); w > 0 {
						if len(q) > 0 {
							break // collect acknowledgements meanwhile
						}
						select {
						case <-ctx.Done():
							return ctx.Err()
						case <-time.After(w):
						}
					}
				}
				i, next = next, next+1
				if o.OnSend != nil {
					o.OnSend(i, time.Now())
				}
			}
			p.Tries.Add(1)
			q = append(q, pending{i: i, tok: p.c.Publish(msgs[i].Topic, 1, false, msgs[i].Payload), at: time.Now()})
		}
		if len(q) == 0 {
			continue
		}
		h := q[0]
		if o.Rate > 0 && next < len(msgs) && len(q) < window {
			// Paced: wait for the head only until the next send is due.
			due := start.Add(time.Duration(float64(next) / o.Rate * float64(time.Second)))
			w := time.Until(due)
			if w <= 0 {
				continue
			}
			if !h.tok.WaitTimeout(w) {
				if time.Since(h.at) > p.AckTimeout {
					q = q[1:]
					retry = append(retry, h.i)
				}
				continue
			}
		} else if !h.tok.WaitTimeout(time.Until(h.at.Add(p.AckTimeout))) {
			q = q[1:]
			retry = append(retry, h.i)
			continue
		}
		q = q[1:]
		if h.tok.Error() != nil {
			retry = append(retry, h.i)
			continue
		}
		p.Acked.Add(1)
	}
	return nil
}

// ClearSession removes a persistent session (and its queue) from the broker:
// it connects with the client id and a clean session, then disconnects.
func ClearSession(broker, clientID string) error {
	c := mqtt.NewClient(mqtt.NewClientOptions().AddBroker(broker).SetClientID(clientID).SetCleanSession(true).
		SetConnectTimeout(10 * time.Second))
	tok := c.Connect()
	if !tok.WaitTimeout(15 * time.Second) {
		return fmt.Errorf("clear session %s: no connection within 15 s", clientID)
	}
	if err := tok.Error(); err != nil {
		return fmt.Errorf("clear session %s: %w", clientID, err)
	}
	c.Disconnect(50)
	return nil
}
