package config

import "time"

// Default values, all in one place. Detection defaults follow SCIENCE.md §5.
const (
	DefaultBroker          = "tcp://127.0.0.1:1883"
	DefaultClientID        = "holomix"
	DefaultQoS             = 1
	DefaultKeepAlive       = 30 * time.Second
	DefaultFormat          = "json"
	DefaultBucket          = "lake/autogen"
	DefaultBatchSize       = 5000
	DefaultWritesInFlight  = 2
	DefaultInfluxTimeout   = 10 * time.Second
	DefaultStorageDir      = "/var/lib/holomix"
	DefaultSpoolMaxBytes   = 1 << 30
	DefaultDeadLetterMax   = 10000
	DefaultMemoryLimit     = 112 << 20 // soft limit: holds 1,000 sites of 30 sensors under 150 MB resident (deploy/bench.sh)
	DefaultListen          = "127.0.0.1:8750"
	DefaultReceiverTimeout = 10 * time.Second
	DefaultIntakeRate      = 1.0 // °C per hour
)

// Defaults fills every zero value with its default. It is the only place defaults live.
func Defaults(c *Config) {
	m := &c.MQTT
	setS(&m.Broker, DefaultBroker)
	setS(&m.ClientID, DefaultClientID)
	if m.QoS == 0 && !c.explicitQoS0 {
		m.QoS = DefaultQoS
	}
	setD(&m.KeepAlive, DefaultKeepAlive)
	for i := range m.Subscriptions {
		setS(&m.Subscriptions[i].Format, DefaultFormat)
	}

	in := &c.Influx
	setS(&in.Bucket, DefaultBucket)
	setI(&in.BatchSize, DefaultBatchSize)
	setI(&in.WritesInFlight, DefaultWritesInFlight)
	setD(&in.Timeout, DefaultInfluxTimeout)

	st := &c.Storage
	setS(&st.Dir, DefaultStorageDir)
	if st.SpoolMaxBytes == 0 {
		st.SpoolMaxBytes = DefaultSpoolMaxBytes
	}
	setI(&st.DeadLetterMax, DefaultDeadLetterMax)
	if st.MemoryLimit == 0 && !c.explicitNoMemoryLimit {
		st.MemoryLimit = DefaultMemoryLimit
	}

	for i := range c.Sites {
		s := &c.Sites[i]
		setS(&s.Name, s.ID)
		setS(&s.Timezone, "UTC")
		for j := range s.Intakes {
			setF(&s.Intakes[j].MaxRateCPerH, DefaultIntakeRate)
		}
	}

	d := &c.Detect
	setF(&d.StratDensityDiff, 0.1)
	setF(&d.StratHysteresis, 0.5)
	setF(&d.TmdDelta, 0.3)
	setF(&d.InverseDeltaT, 0.1)
	setF(&d.ThermoclineMinGrad, 0.1)
	setD(&d.HoldTime, 6*time.Hour)
	setD(&d.IceHoldTime, 24*time.Hour)
	setD(&d.ProfileInterval, 10*time.Minute)
	setD(&d.Watermark, 30*time.Minute)
	setF(&d.FrazilMaxC, 0.1)
	setF(&d.FrazilAirC, -6)
	setD(&d.SensorFaultAfter, 6*time.Hour)
	setD(&d.ProjectionWindow, 5*24*time.Hour)
	setF(&d.MinSurfaceDepth, 2)
	setD(&d.MaxGap, 7*24*time.Hour)
	setD(&d.MinStratified, 7*24*time.Hour)

	for i := range c.Alerts.Receivers {
		r := &c.Alerts.Receivers[i]
		setS(&r.Type, "webhook")
		setS(&r.MinSeverity, "info")
		setD(&r.Timeout, DefaultReceiverTimeout)
	}

	setS(&c.HTTP.Listen, DefaultListen)

	g := &c.Ingest
	if g.RangeMinC == 0 && g.RangeMaxC == 0 {
		g.RangeMinC, g.RangeMaxC = -3, 45
	}
	setF(&g.SpikeC, 5)
	setD(&g.StuckAfter, 24*time.Hour)
	setD(&g.FutureTolerance, 5*time.Minute)
	setD(&g.CommitInterval, 5*time.Millisecond)
	setI(&g.CommitMax, 5000)
	setI(&g.MaxPayloadBytes, 256<<10)

	setS(&c.Log.Level, "info")
	setS(&c.Log.Format, "text")
}

func setS(p *string, v string) {
	if *p == "" {
		*p = v
	}
}

func setI(p *int, v int) {
	if *p == 0 {
		*p = v
	}
}

func setF(p *float64, v float64) {
	if *p == 0 {
		*p = v
	}
}

func setD(p *Duration, v time.Duration) {
	if *p == 0 {
		*p = Duration(v)
	}
}
