// Package rig is the shared harness of the benchmark (deploy/bench) and the
// fault suite (deploy/faults): synthetic buoy traffic with alert-triggering
// intake changes, a QoS 1 publisher, the holomix daemon as a child process, a
// Standard-Webhooks-verifying receiver and InfluxDB queries. Everything it
// starts listens on 127.0.0.1.
package rig

import (
	"fmt"
	"math"
	"strconv"
	"time"
)

// Msg is one MQTT message to publish.
type Msg struct {
	Topic   string
	Payload []byte
}

// Stream describes synthetic traffic from Sites buoys with one sensor at
// each of Depths, one reading per sensor every Interval of data time from T0.
//
// The column is either a still, nearly isothermal 10 °C column (Stratified
// false) or a summer column warm at the top (21 °C at the surface, 0.6 °C
// colder per metre). Every value wobbles by a few hundredths of a degree
// from step to step so that quality control never finds a stuck sensor.
//
// Trigger sites (the first TriggerSites, all when 0) see the water within
// 1.6 m of IntakeDepth jump by ±Jump °C (alternately up and down) every
// TriggerEvery steps: against the sample an hour before, the intake's
// temperature then changes at Jump °C/h, above the default limit of 1 °C/h,
// which fires intake_change (detect/intake.go); after six steps the rate is
// back to the wobble and after an hour of calm the change resolves.
type Stream struct {
	Prefix       string    // topic root: PREFIX/SITE/temp and PREFIX/SITE/profile
	Sites        int       // number of sites, named SitePrefix000…
	SitePrefix   string    // default "buoy"
	Depths       []float64 // sensor depths, m
	T0           time.Time // time of step 0 (UTC, aligned to Interval)
	Interval     time.Duration
	Stratified   bool
	IntakeDepth  float64 // m; 0: no jumps
	TriggerEvery int     // steps between jumps; 0: no jumps
	TriggerSites int     // sites with jumps (the first ones); 0: all
	Jump         float64 // °C; 0: 2
}

// Calm is the number of steps after a jump during which the intake's rate
// stays high (the reference sample is up to an hour old) plus the hour of
// calm after which intake_change resolves, at a 10-minute interval.
const calmSteps = 12

// MinTriggerEvery is the smallest TriggerEvery that lets every change
// resolve before the next jump (so that each jump opens its own episode).
const MinTriggerEvery = calmSteps + 2

// SiteID returns the id of site i.
func (s Stream) SiteID(i int) string {
	p := s.SitePrefix
	if p == "" {
		p = "buoy"
	}
	return fmt.Sprintf("%s%03d", p, i)
}

// TempTopic and ProfileTopic are site i's topics.
func (s Stream) TempTopic(i int) string    { return s.Prefix + "/" + s.SiteID(i) + "/temp" }
func (s Stream) ProfileTopic(i int) string { return s.Prefix + "/" + s.SiteID(i) + "/profile" }

// Time returns the data time of step k.
func (s Stream) Time(k int) time.Time { return s.T0.Add(time.Duration(k) * s.interval()) }

func (s Stream) interval() time.Duration {
	if s.Interval <= 0 {
		return 10 * time.Minute
	}
	return s.Interval
}

func (s Stream) jump() float64 {
	if s.Jump == 0 {
		return 2
	}
	return s.Jump
}

// Triggers reports whether site i has intake jumps.
func (s Stream) Triggers(i int) bool {
	return s.TriggerEvery > 0 && s.IntakeDepth > 0 && (s.TriggerSites <= 0 || i < s.TriggerSites)
}

// JumpAt reports whether site i's intake water jumps at step k.
func (s Stream) JumpAt(i, k int) bool {
	return s.Triggers(i) && k > 0 && k%s.TriggerEvery == 0
}

// offset is the jump offset at step k: +Jump after odd-numbered jumps until
// the next one, 0 otherwise.
func (s Stream) offset(i, d, k int) float64 {
	if !s.Triggers(i) || math.Abs(s.Depths[d]-s.IntakeDepth) > 1.6 {
		return 0
	}
	if n := k / s.TriggerEvery; n%2 == 1 {
		return s.jump()
	}
	return 0
}

// Temp returns the temperature (°C, two decimals) of site i, depth index d,
// step k.
func (s Stream) Temp(i, d, k int) float64 {
	wobble := 0.01 * float64((k+3*d+7*i)%5)
	var base float64
	if s.Stratified {
		base = 21 - 0.6*s.Depths[d] + 0.2*math.Sin(float64(k)/20)
	} else {
		base = 10
	}
	return math.Round((base+wobble+s.offset(i, d, k))*100) / 100
}

func appendTemp(b []byte, v float64) []byte { return strconv.AppendFloat(b, v, 'f', 2, 64) }

// Reading returns the one-reading json message of site i, depth index d, step k.
func (s Stream) Reading(i, d, k int) Msg {
	b := make([]byte, 0, 80)
	b = append(b, `{"time":"`...)
	b = s.Time(k).AppendFormat(b, time.RFC3339)
	b = append(b, `","depth_m":`...)
	b = strconv.AppendFloat(b, s.Depths[d], 'f', -1, 64)
	b = append(b, `,"temp_c":`...)
	b = appendTemp(b, s.Temp(i, d, k))
	b = append(b, '}')
	return Msg{Topic: s.TempTopic(i), Payload: b}
}

// Profile returns the json-profile message of site i at step k.
func (s Stream) Profile(i, k int) Msg {
	b := make([]byte, 0, 64+14*len(s.Depths))
	b = append(b, `{"time":"`...)
	b = s.Time(k).AppendFormat(b, time.RFC3339)
	b = append(b, `","depths_m":[`...)
	for d, z := range s.Depths {
		if d > 0 {
			b = append(b, ',')
		}
		b = strconv.AppendFloat(b, z, 'f', -1, 64)
	}
	b = append(b, `],"temps_c":[`...)
	for d := range s.Depths {
		if d > 0 {
			b = append(b, ',')
		}
		b = appendTemp(b, s.Temp(i, d, k))
	}
	b = append(b, ']', '}')
	return Msg{Topic: s.ProfileTopic(i), Payload: b}
}

// ReadingsStep returns step k as one-reading messages, site by site, each
// site's depths in order.
func (s Stream) ReadingsStep(k int) []Msg {
	out := make([]Msg, 0, s.Sites*len(s.Depths))
	for i := 0; i < s.Sites; i++ {
		for d := range s.Depths {
			out = append(out, s.Reading(i, d, k))
		}
	}
	return out
}

// ProfilesStep returns step k as one profile message per site.
func (s Stream) ProfilesStep(k int) []Msg {
	out := make([]Msg, 0, s.Sites)
	for i := 0; i < s.Sites; i++ {
		out = append(out, s.Profile(i, k))
	}
	return out
}

// Key identifies a reading: site, depth in millimetres, Unix time in seconds.
type Key struct {
	Site  string
	Depth int64
	Time  int64
}

// KeyOf builds a Key.
func KeyOf(site string, depthM float64, t time.Time) Key {
	return Key{Site: site, Depth: int64(math.Round(depthM * 1000)), Time: t.Unix()}
}

// AddReadings records step k's readings in m (key → temperature).
func (s Stream) AddReadings(m map[Key]float64, k int) {
	for i := 0; i < s.Sites; i++ {
		for d, z := range s.Depths {
			m[KeyOf(s.SiteID(i), z, s.Time(k))] = s.Temp(i, d, k)
		}
	}
}

// ExpectedAlert is an alert the stream must produce.
type ExpectedAlert struct {
	Site   string
	Kind   string
	Status string // firing or resolved
	Time   time.Time
}

func (a ExpectedAlert) String() string {
	return fmt.Sprintf("%s %s %s %s", a.Site, a.Kind, a.Status, a.Time.UTC().Format(time.RFC3339))
}

// ExpectedAlerts returns the intake_change alerts of steps 0..steps-1: a
// firing at every jump and a resolution calmSteps later when that step is
// published.
func (s Stream) ExpectedAlerts(steps int) []ExpectedAlert {
	var out []ExpectedAlert
	for i := 0; i < s.Sites; i++ {
		for k := 1; k < steps; k++ {
			if !s.JumpAt(i, k) {
				continue
			}
			out = append(out, ExpectedAlert{Site: s.SiteID(i), Kind: "intake_change", Status: "firing", Time: s.Time(k)})
			if k+calmSteps < steps {
				out = append(out, ExpectedAlert{Site: s.SiteID(i), Kind: "intake_change", Status: "resolved", Time: s.Time(k + calmSteps)})
			}
		}
	}
	return out
}

// Depths returns n sensor depths: 0.5, 1.5, … (first 0.5, then 1 m apart).
func Depths(n int, first, step float64) []float64 {
	out := make([]float64, n)
	for i := range out {
		out[i] = first + step*float64(i)
	}
	return out
}
