package status

import (
	"fmt"
	"math"
)

// viridis holds 11 evenly spaced stops (0, 0.1, … 1) of the viridis colour
// map (van der Walt & Smith 2015, released to the public domain with
// matplotlib), sRGB 0-255 [M: stop values from memory]. Its lightness rises
// monotonically, so it reads correctly to colour-blind viewers and in
// greyscale print; TestViridis_LuminanceMonotonic checks that property.
var viridis = [11][3]uint8{
	{0x44, 0x01, 0x54},
	{0x48, 0x24, 0x75},
	{0x41, 0x44, 0x87},
	{0x35, 0x5f, 0x8d},
	{0x2a, 0x78, 0x8e},
	{0x21, 0x91, 0x8c},
	{0x22, 0xa8, 0x84},
	{0x44, 0xbf, 0x70},
	{0x7a, 0xd1, 0x51},
	{0xbd, 0xdf, 0x26},
	{0xfd, 0xe7, 0x25},
}

// colourAt returns the colour at f in [0, 1] (clamped), linearly
// interpolated in sRGB between the stops.
func colourAt(f float64) (r, g, b uint8) {
	if math.IsNaN(f) {
		f = 0
	}
	f = math.Max(0, math.Min(1, f))
	x := f * float64(len(viridis)-1)
	i := int(x)
	if i >= len(viridis)-1 {
		c := viridis[len(viridis)-1]
		return c[0], c[1], c[2]
	}
	t := x - float64(i)
	a, c := viridis[i], viridis[i+1]
	mix := func(p, q uint8) uint8 { return uint8(math.Round(float64(p) + t*(float64(q)-float64(p)))) }
	return mix(a[0], c[0]), mix(a[1], c[1]), mix(a[2], c[2])
}

func colourHex(f float64) string {
	r, g, b := colourAt(f)
	return fmt.Sprintf("#%02x%02x%02x", r, g, b)
}

// relLuminance is the relative luminance of an sRGB colour (WCAG 2.x
// definition, IEC 61966-2-1 transfer function).
func relLuminance(r, g, b uint8) float64 {
	lin := func(c uint8) float64 {
		v := float64(c) / 255
		if v <= 0.04045 {
			return v / 12.92
		}
		return math.Pow((v+0.055)/1.055, 2.4)
	}
	return 0.2126*lin(r) + 0.7152*lin(g) + 0.0722*lin(b)
}
