package config

import (
	"fmt"
	"path/filepath"
)

// Instance is one daemon's configuration in a partitioned deployment.
type Instance struct {
	Name   string // how warnings name it, e.g. the file path
	Config *Config
}

// PartitionWarnings checks that several instances sharing one broker and one
// database split the work cleanly, and describes every clash it finds:
//   - a site id configured in two instances (both would detect and alert on it);
//   - overlapping MQTT topic filters (FiltersOverlap): both instances receive
//     those messages, so readings are stored twice and alerts raised twice;
//   - the same mqtt.client_id: the broker allows one connection per client id,
//     so the two instances would take the session from each other in turn;
//   - the same storage.dir: harmless on different machines, but on one machine
//     the second daemon cannot open the spool (and must not share it).
//
// An empty result means the partition is clean.
func PartitionWarnings(instances []Instance) []string {
	var out []string
	for i := 0; i < len(instances); i++ {
		for j := i + 1; j < len(instances); j++ {
			out = append(out, pairWarnings(instances[i], instances[j])...)
		}
	}
	return out
}

func pairWarnings(a, b Instance) []string {
	var out []string
	ac, bc := a.Config, b.Config
	sites := map[string]bool{}
	for _, s := range ac.Sites {
		sites[s.ID] = true
	}
	for _, s := range bc.Sites {
		if sites[s.ID] {
			out = append(out, fmt.Sprintf("site %q is configured in both %s and %s: give each site to one instance", s.ID, a.Name, b.Name))
		}
	}
	for i, sa := range ac.MQTT.Subscriptions {
		for j, sb := range bc.MQTT.Subscriptions {
			if FiltersOverlap(sa.Topic, sb.Topic) {
				out = append(out, fmt.Sprintf("topic filter %q (%s mqtt.subscriptions[%d]) overlaps %q (%s mqtt.subscriptions[%d]): "+
					"both instances receive those messages, so readings are stored twice and alerts raised twice",
					sa.Topic, a.Name, i, sb.Topic, b.Name, j))
			}
		}
	}
	if ac.MQTT.ClientID == bc.MQTT.ClientID {
		out = append(out, fmt.Sprintf("mqtt.client_id %q is used by both %s and %s: the broker keeps one connection per client id, "+
			"so they would disconnect each other and share one session; give each instance its own", ac.MQTT.ClientID, a.Name, b.Name))
	}
	if filepath.Clean(ac.Storage.Dir) == filepath.Clean(bc.Storage.Dir) {
		out = append(out, fmt.Sprintf("storage.dir %s is used by both %s and %s: on one machine they must not share it "+
			"(spool, outbox and detector state belong to one instance)", ac.Storage.Dir, a.Name, b.Name))
	}
	return out
}
