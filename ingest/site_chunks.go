package ingest

import (
	"cmp"
	"encoding/binary"
	"fmt"
	"slices"
)

// SiteChanges records the sites whose saved state is out of date: the
// change record behind the per-site checkpoint chunks of quality control,
// the duplicate memory and the detection engine. The zero value has nothing
// recorded; after a start or a restore everything is out of date (SetAll).
type SiteChanges struct {
	sites   map[string]struct{}
	all     bool
	last    string // the site recorded last (consecutive readings share a site)
	hasLast bool
}

// Touch records that site's state changed.
func (c *SiteChanges) Touch(site string) {
	if c.all || (c.hasLast && site == c.last) {
		return
	}
	if c.sites == nil {
		c.sites = make(map[string]struct{})
	}
	c.sites[site] = struct{}{}
	c.last, c.hasLast = site, true
}

// SetAll marks every site out of date.
func (c *SiteChanges) SetAll() { *c = SiteChanges{all: true} }

// Take resets the record and returns what it held (every site when all is
// set).
func (c *SiteChanges) Take(all bool) ChangedSites {
	ch := ChangedSites{All: all || c.all, Sites: c.sites}
	*c = SiteChanges{}
	return ch
}

// ChangedSites is what SiteChanges.Take returns: every site (All) or the
// sites in Sites.
type ChangedSites struct {
	All   bool
	Sites map[string]struct{}
}

// Has reports whether site's state is out of date.
func (c ChangedSites) Has(site string) bool {
	if c.All {
		return true
	}
	_, ok := c.Sites[site]
	return ok
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
