package testenv

import (
	mqtt "github.com/eclipse/paho.mqtt.golang"
	"github.com/eclipse/paho.mqtt.golang/packets"
)

// PublisherStore returns paho's memory store for test and benchmark
// publishers, except that it never hands out the packet it was given: Put
// keeps a copy of every PUBLISH and Get returns a fresh copy of that.
//
// paho 1.5.1 shares one *PublishPacket between its send queue and its store.
// After a reconnect, resume sets the DUP flag on the stored packet while the
// new connection's writer may be encoding the same packet from the queue, a
// data race `go test -race` reports (seen in the broker-restart fault
// scenario). With copies, the two never touch the same memory. Put runs on
// the publishing goroutine before the packet is queued, so the copy is taken
// before anyone else can write to it.
func PublisherStore() mqtt.Store { return copyingStore{mqtt.NewMemoryStore()} }

type copyingStore struct{ mqtt.Store }

func (s copyingStore) Put(key string, m packets.ControlPacket) { s.Store.Put(key, clonePublish(m)) }

func (s copyingStore) Get(key string) packets.ControlPacket { return clonePublish(s.Store.Get(key)) }

// clonePublish copies a PUBLISH (the payload and topic are never written
// after creation, so a shallow copy is enough); other packets pass through.
func clonePublish(m packets.ControlPacket) packets.ControlPacket {
	if p, ok := m.(*packets.PublishPacket); ok && p != nil {
		cp := *p
		return &cp
	}
	return m
}
