package ingest

import (
	"encoding/binary"
	"errors"
	"fmt"
	"math"
	"time"
)

// Block encoding of spooled readings (the values of bucket r). All integers
// are big-endian or (u)varints (encoding/binary); floats are IEEE 754 bits,
// little-endian, so a value reads back bit for bit.
//
//	byte     version (1)
//	int64    commit time, Unix ns
//	uint32   n, readings in the block
//	uvarint  number of strings, then each: uvarint length, bytes (sites and sensors)
//	n times:
//	  uvarint  site string index
//	  uvarint  sensor string index + 1 (0: no sensor)
//	  8 bytes  depth (m)
//	  8 bytes  temperature (°C)
//	  varint   time (Unix ns) minus the previous reading's time (the first: minus the commit time)
//	  varint   receive time (Unix ns) minus the commit time
//	  uvarint  QC flags
//	  uvarint  flags set before quality control (PreQC), plus 1<<16 when Redelivered
//
// A reading takes about 27 bytes plus its share of the string table.

const (
	blockVersion   = 1
	blockHeaderLen = 1 + 8 + 4
	redeliveredBit = 1 << 16
)

var errShortBlock = errors.New("truncated block")

// blockEncoder reuses its buffers across blocks. It is not safe for concurrent use.
type blockEncoder struct {
	buf  []byte
	strs map[string]uint64
	list []string
}

func (e *blockEncoder) index(s string) uint64 {
	if i, ok := e.strs[s]; ok {
		return i
	}
	i := uint64(len(e.list))
	e.strs[s] = i
	e.list = append(e.list, s)
	return i
}

// encode returns the block for es (len(es) <= spoolBlockMax). The result is
// valid until the next call.
func (e *blockEncoder) encode(es []Entry, commit time.Time) []byte {
	if e.strs == nil {
		e.strs = make(map[string]uint64)
	}
	clear(e.strs)
	e.list = e.list[:0]
	// First pass: the string table.
	for i := range es {
		e.index(es[i].Site)
		if es[i].Sensor != "" {
			e.index(es[i].Sensor)
		}
	}
	b := e.buf[:0]
	cn := commit.UnixNano()
	b = append(b, blockVersion)
	b = binary.BigEndian.AppendUint64(b, uint64(cn))
	b = binary.BigEndian.AppendUint32(b, uint32(len(es)))
	b = binary.AppendUvarint(b, uint64(len(e.list)))
	for _, s := range e.list {
		b = binary.AppendUvarint(b, uint64(len(s)))
		b = append(b, s...)
	}
	prev := cn
	for i := range es {
		r := &es[i]
		b = binary.AppendUvarint(b, e.strs[r.Site])
		if r.Sensor == "" {
			b = append(b, 0)
		} else {
			b = binary.AppendUvarint(b, e.strs[r.Sensor]+1)
		}
		b = binary.LittleEndian.AppendUint64(b, math.Float64bits(r.Depth))
		b = binary.LittleEndian.AppendUint64(b, math.Float64bits(r.TempC))
		tn := r.Time.UnixNano()
		b = binary.AppendVarint(b, tn-prev)
		prev = tn
		b = binary.AppendVarint(b, r.Recv.UnixNano()-cn)
		b = binary.AppendUvarint(b, uint64(r.QC))
		pre := uint64(r.PreQC)
		if r.Redelivered {
			pre |= redeliveredBit
		}
		b = binary.AppendUvarint(b, pre)
	}
	e.buf = b
	return b
}

// entrySize is an upper bound of one entry's encoded size, string table
// included (used to check the spool's room before quality control runs).
func entrySize(r *Reading) int64 {
	// indexes 3+3, floats 16, times 10+10, flags 3+3, string lengths 3+3
	return int64(54 + len(r.Site) + len(r.Sensor))
}

func blockLen(v []byte) (int, error) {
	if len(v) < blockHeaderLen {
		return 0, errShortBlock
	}
	if v[0] != blockVersion {
		return 0, fmt.Errorf("block version %d, want %d", v[0], blockVersion)
	}
	n := int(binary.BigEndian.Uint32(v[9:13]))
	if n == 0 {
		return 0, errors.New("empty block")
	}
	return n, nil
}

func blockTime(v []byte) (time.Time, error) {
	if len(v) < blockHeaderLen {
		return time.Time{}, errShortBlock
	}
	return time.Unix(0, int64(binary.BigEndian.Uint64(v[1:9]))).UTC(), nil
}

// blockDecoder decodes blocks; it is not safe for concurrent use.
type blockDecoder struct {
	strs []string
}

// decode appends the entries of block v (first sequence number first) from
// index skip on, at most want of them, to dst.
func (d *blockDecoder) decode(v []byte, first uint64, skip, want int, dst []Entry) ([]Entry, error) {
	n, err := blockLen(v)
	if err != nil {
		return dst, err
	}
	cn := int64(binary.BigEndian.Uint64(v[1:9]))
	p := v[blockHeaderLen:]
	uv := func() (uint64, bool) {
		x, k := binary.Uvarint(p)
		if k <= 0 {
			return 0, false
		}
		p = p[k:]
		return x, true
	}
	sv := func() (int64, bool) {
		x, k := binary.Varint(p)
		if k <= 0 {
			return 0, false
		}
		p = p[k:]
		return x, true
	}
	ns, ok := uv()
	if !ok || ns > uint64(2*n) {
		return dst, errShortBlock
	}
	d.strs = d.strs[:0]
	for range ns {
		l, ok := uv()
		if !ok || l > uint64(len(p)) {
			return dst, errShortBlock
		}
		d.strs = append(d.strs, string(p[:l]))
		p = p[l:]
	}
	prev := cn
	for i := 0; i < n; i++ {
		si, ok1 := uv()
		se, ok2 := uv()
		if !ok1 || !ok2 || si >= uint64(len(d.strs)) || se > uint64(len(d.strs)) || len(p) < 16 {
			return dst, errShortBlock
		}
		depth := math.Float64frombits(binary.LittleEndian.Uint64(p))
		temp := math.Float64frombits(binary.LittleEndian.Uint64(p[8:]))
		p = p[16:]
		dt, ok3 := sv()
		dr, ok4 := sv()
		qc, ok5 := uv()
		pre, ok6 := uv()
		if !ok3 || !ok4 || !ok5 || !ok6 {
			return dst, errShortBlock
		}
		tn := prev + dt
		prev = tn
		if i < skip {
			continue
		}
		if want <= 0 {
			break
		}
		want--
		e := Entry{
			Seq:         first + uint64(i),
			Recv:        time.Unix(0, cn+dr).UTC(),
			PreQC:       QC(pre & 0xffff),
			Redelivered: pre&redeliveredBit != 0,
			Reading: Reading{
				Site: d.strs[si], Depth: depth, Time: time.Unix(0, tn).UTC(), TempC: temp, QC: QC(qc),
			},
		}
		if se > 0 {
			e.Sensor = d.strs[se-1]
		}
		dst = append(dst, e)
	}
	return dst, nil
}

// Dead-letter encoding (values of bucket x):
//
//	byte    version (1)
//	int64   time, Unix ns
//	then uvarint-length-prefixed: kind, topic, reason, detail, payload
func encodeDead(d *DeadLetter) []byte {
	b := make([]byte, 0, 9+5*2+len(d.Kind)+len(d.Topic)+len(d.Reason)+len(d.Detail)+len(d.Payload))
	b = append(b, 1)
	b = binary.BigEndian.AppendUint64(b, uint64(d.Time.UnixNano()))
	for _, s := range [...][]byte{[]byte(d.Kind), []byte(d.Topic), []byte(d.Reason), []byte(d.Detail), d.Payload} {
		b = binary.AppendUvarint(b, uint64(len(s)))
		b = append(b, s...)
	}
	return b
}

func decodeDead(v []byte) (DeadLetter, error) {
	var d DeadLetter
	if len(v) < 9 || v[0] != 1 {
		return d, errors.New("bad dead-letter record")
	}
	d.Time = time.Unix(0, int64(binary.BigEndian.Uint64(v[1:9]))).UTC()
	p := v[9:]
	var parts [5][]byte
	for i := range parts {
		l, k := binary.Uvarint(p)
		if k <= 0 || l > uint64(len(p)-k) {
			return d, errors.New("truncated dead-letter record")
		}
		parts[i] = p[k : k+int(l)]
		p = p[k+int(l):]
	}
	d.Kind, d.Topic, d.Reason, d.Detail = string(parts[0]), string(parts[1]), string(parts[2]), string(parts[3])
	d.Payload = append([]byte(nil), parts[4]...)
	return d, nil
}
