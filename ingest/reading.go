// Package ingest owns the path from a buoy to the database: MQTT subscription,
// payload decoders, quality control, the durable spool, the InfluxDB writer,
// profile assembly, and the file and simulator sources. It does not know what
// a lake event is.
package ingest

import "time"

// QC is a set of quality-control flags carried by every stored reading.
// A reading with any flag set is stored (with the flags) but kept out of detection.
type QC uint16

// Quality-control flags. The numeric values are part of the stored schema
// (field "qc" of measurement water_temperature): never renumber them.
const (
	QCRange        QC = 1 << iota // outside the physical range (-3 °C .. 45 °C)
	QCSpike                       // jumps away from the sensor's own recent values
	QCStuck                       // unchanged to 0.001 °C for longer than the configured time
	QCFuture                      // timestamp later than receive time plus tolerance
	QCDuplicate                   // same site, depth and time already seen
	QCUnknownDepth                // depth is not among the site's configured sensor depths
	QCNoTime                      // payload had no timestamp; receive time used (informational, not excluding)
	QCLate                        // arrived after its profile was closed (stored, not detected)
)

// Excluding is the set of flags that keep a reading out of detection.
const Excluding = QCRange | QCSpike | QCStuck | QCFuture | QCDuplicate | QCUnknownDepth

// Reading is one temperature at one depth at one instant. Units: depth in metres
// below the surface (positive down), temperature in °C, time in UTC.
type Reading struct {
	Site   string
	Sensor string // optional sensor id (e.g. a SenML record name)
	Depth  float64
	Time   time.Time
	TempC  float64
	QC     QC
}

// Usable reports whether the reading may be used by detection.
func (r Reading) Usable() bool { return r.QC&Excluding == 0 }
