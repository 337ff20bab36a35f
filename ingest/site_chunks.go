package ingest

import (
	"cmp"
	"encoding/binary"
	"fmt"
	"slices"
)

// siteChanges records the sites whose saved state is out of date: the
// change record behind WriteStateChunks of quality control and of the
// duplicate memory. The zero value has nothing recorded; after a start or a
// restore everything is out of date (setAll).
type siteChanges struct {
	sites   map[string]struct{}
	all     bool
	last    string // the site recorded last (consecutive readings share a site)
	hasLast bool
}

// touch records that site's state changed.
func (c *siteChanges) touch(site string) {
	if c.all || (c.hasLast && site == c.last) {
		return
	}
	if c.sites == nil {
		c.sites = make(map[string]struct{})
	}
	c.sites[site] = struct{}{}
	c.last, c.hasLast = site, true
}

// setAll marks every site out of date.
func (c *siteChanges) setAll() { *c = siteChanges{all: true} }

// take resets the record and returns whether a site was out of date (every
// site when all is set or everything was).
func (c *siteChanges) take(all bool) func(site string) bool {
	all = all || c.all
	sites := c.sites
	*c = siteChanges{}
	return func(site string) bool {
		if all {
			return true
		}
		_, ok := sites[site]
		return ok
	}
}

// chunkEntry is one item of a site's chunk: its sort key and its value.
type chunkEntry[K cmp.Ordered, V any] struct {
	key K
	val V
}

// writeSiteChunks calls put once per site that want selects, sites in
// ascending order, with the chunk version, the entry count (uvarint) and
// each entry as enc appends it, entries in key order. bySite holds the
// entries per site; what names the state in errors.
func writeSiteChunks[K cmp.Ordered, V any](what string, version byte, bySite map[string][]chunkEntry[K, V],
	enc func(b []byte, key K, val V) []byte, put ChunkFunc) error {
	sites := make([]string, 0, len(bySite))
	for site := range bySite {
		sites = append(sites, site)
	}
	slices.Sort(sites)
	var b []byte
	for _, site := range sites {
		es := bySite[site]
		slices.SortFunc(es, func(x, y chunkEntry[K, V]) int { return cmp.Compare(x.key, y.key) })
		b = append(b[:0], version)
		b = binary.AppendUvarint(b, uint64(len(es)))
		for _, e := range es {
			b = enc(b, e.key, e.val)
		}
		if err := put(site, b); err != nil {
			return fmt.Errorf("%s: site %q: %w", what, site, err)
		}
	}
	return nil
}
