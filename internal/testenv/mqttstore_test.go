package testenv

import (
	"testing"

	"github.com/eclipse/paho.mqtt.golang/packets"
)

// TestPublisherStoreCopies: the store never returns the packet the client
// queued, nor the same packet twice, so paho's resume can set DUP on what it
// gets while the original is being written to the wire.
func TestPublisherStoreCopies(t *testing.T) {
	s := PublisherStore()
	s.Open()
	defer s.Close()
	pub := packets.NewControlPacket(packets.Publish).(*packets.PublishPacket)
	pub.Qos, pub.MessageID, pub.TopicName, pub.Payload = 1, 7, "lakes/larchmere/temp", []byte(`{"temp_c":4.0}`)
	s.Put("o.7", pub)
	got := s.Get("o.7").(*packets.PublishPacket)
	if got == pub {
		t.Fatal("Get returned the queued packet itself")
	}
	if got.MessageID != 7 || got.TopicName != pub.TopicName || string(got.Payload) != string(pub.Payload) || got.Qos != 1 {
		t.Fatalf("copy differs: %v", got)
	}
	got.Dup = true // what resume does
	if pub.Dup {
		t.Fatal("DUP set on the copy reached the queued packet")
	}
	if again := s.Get("o.7").(*packets.PublishPacket); again == got || again.Dup {
		t.Fatal("a second Get shares the first one's packet")
	}
	if len(s.All()) != 1 {
		t.Fatalf("store keys %v", s.All())
	}
	s.Del("o.7")
	if s.Get("o.7") != nil {
		t.Fatal("deleted packet still there")
	}
}
