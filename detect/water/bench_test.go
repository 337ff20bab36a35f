package water

import (
	"math"
	"testing"
)

// benchColumn is a summer profile of 30 sensors every metre from 0.5 m in an
// invented 32 m deep basin with a hypsography every metre.
func benchColumn() Column {
	c := Column{MaxDepth: 32, Hypsography: coneHyps(3.2e6, 32, 1)}
	for i := 0; i < 30; i++ {
		z := 0.5 + float64(i)
		c.Depths = append(c.Depths, z)
		c.Temps = append(c.Temps, 6+16/(1+math.Exp((z-9)/1.5))) // tanh-like thermocline near 9 m
	}
	return c
}

func BenchmarkCompute30Hypso(b *testing.B) {
	c := benchColumn()
	var m Metrics
	if err := Compute(c, &m); err != nil {
		b.Fatal(err)
	}
	b.ReportAllocs()
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		if err := Compute(c, &m); err != nil {
			b.Fatal(err)
		}
	}
}
