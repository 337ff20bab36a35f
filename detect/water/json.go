package water

import (
	"encoding/json"
	"math"
	"strconv"
)

// jsonFloat is a float64 that marshals NaN and ±Inf as null and unmarshals null
// as NaN, since JSON has no NaN.
type jsonFloat float64

func (f jsonFloat) MarshalJSON() ([]byte, error) {
	x := float64(f)
	if math.IsNaN(x) || math.IsInf(x, 0) {
		return []byte("null"), nil
	}
	return strconv.AppendFloat(nil, x, 'g', -1, 64), nil
}

func (f *jsonFloat) UnmarshalJSON(b []byte) error {
	if string(b) == "null" {
		*f = jsonFloat(math.NaN())
		return nil
	}
	x, err := strconv.ParseFloat(string(b), 64)
	if err != nil {
		return err
	}
	*f = jsonFloat(x)
	return nil
}

// metricsJSON mirrors Metrics field by field, with the same keys and order.
type metricsJSON struct {
	Formula           Formula     `json:"formula"`
	PressureMethod    string      `json:"pressure_method"`
	DensityKgM3       []jsonFloat `json:"density_kg_m3"`
	TmdC              []jsonFloat `json:"tmd_c"`
	SurfaceTempC      jsonFloat   `json:"surface_temp_c"`
	BottomTempC       jsonFloat   `json:"bottom_temp_c"`
	SurfaceDensity    jsonFloat   `json:"surface_density_kg_m3"`
	BottomDensity     jsonFloat   `json:"bottom_density_kg_m3"`
	DensityDiff       jsonFloat   `json:"density_diff_kg_m3"`
	MeanTempC         jsonFloat   `json:"mean_temp_c"`
	MeanMethod        string      `json:"mean_method"`
	SchmidtJM2        jsonFloat   `json:"schmidt_j_m2"`
	N2                []jsonFloat `json:"n2_s2"`
	MaxN2             jsonFloat   `json:"max_n2_s2"`
	ThermoclineM      jsonFloat   `json:"thermocline_m"`
	MetaTopM          jsonFloat   `json:"metalimnion_top_m"`
	MetaBottomM       jsonFloat   `json:"metalimnion_bottom_m"`
	HeatToTmdJM2      jsonFloat   `json:"heat_to_tmd_j_m2"`
	FreezingPointC    jsonFloat   `json:"freezing_point_c"`
	SensorsUsed       int         `json:"sensors_used"`
	IntegrationDepthM jsonFloat   `json:"integration_depth_m"`
	ThermoclineMethod string      `json:"thermocline_method"`
}

func toJSONFloats(xs []float64) []jsonFloat {
	out := make([]jsonFloat, len(xs))
	for i, x := range xs {
		out[i] = jsonFloat(x)
	}
	return out
}

func fromJSONFloats(xs []jsonFloat) []float64 {
	if xs == nil {
		return nil
	}
	out := make([]float64, len(xs))
	for i, x := range xs {
		out[i] = float64(x)
	}
	return out
}

// MarshalJSON writes m with the keys of its struct tags, writing NaN (for
// instance "no thermocline") as null and nil slices as [].
func (m Metrics) MarshalJSON() ([]byte, error) {
	return json.Marshal(metricsJSON{
		Formula:           m.Formula,
		PressureMethod:    m.PressureMethod,
		DensityKgM3:       toJSONFloats(m.DensityKgM3),
		TmdC:              toJSONFloats(m.TmdC),
		SurfaceTempC:      jsonFloat(m.SurfaceTempC),
		BottomTempC:       jsonFloat(m.BottomTempC),
		SurfaceDensity:    jsonFloat(m.SurfaceDensity),
		BottomDensity:     jsonFloat(m.BottomDensity),
		DensityDiff:       jsonFloat(m.DensityDiff),
		MeanTempC:         jsonFloat(m.MeanTempC),
		MeanMethod:        m.MeanMethod,
		SchmidtJM2:        jsonFloat(m.SchmidtJM2),
		N2:                toJSONFloats(m.N2),
		MaxN2:             jsonFloat(m.MaxN2),
		ThermoclineM:      jsonFloat(m.ThermoclineM),
		MetaTopM:          jsonFloat(m.MetaTopM),
		MetaBottomM:       jsonFloat(m.MetaBottomM),
		HeatToTmdJM2:      jsonFloat(m.HeatToTmdJM2),
		FreezingPointC:    jsonFloat(m.FreezingPointC),
		SensorsUsed:       m.SensorsUsed,
		IntegrationDepthM: jsonFloat(m.IntegrationDepthM),
		ThermoclineMethod: m.ThermoclineMethod,
	})
}

// UnmarshalJSON reads what MarshalJSON writes, turning null back into NaN.
func (m *Metrics) UnmarshalJSON(b []byte) error {
	var j metricsJSON
	if err := json.Unmarshal(b, &j); err != nil {
		return err
	}
	*m = Metrics{
		Formula:           j.Formula,
		PressureMethod:    j.PressureMethod,
		DensityKgM3:       fromJSONFloats(j.DensityKgM3),
		TmdC:              fromJSONFloats(j.TmdC),
		SurfaceTempC:      float64(j.SurfaceTempC),
		BottomTempC:       float64(j.BottomTempC),
		SurfaceDensity:    float64(j.SurfaceDensity),
		BottomDensity:     float64(j.BottomDensity),
		DensityDiff:       float64(j.DensityDiff),
		MeanTempC:         float64(j.MeanTempC),
		MeanMethod:        j.MeanMethod,
		SchmidtJM2:        float64(j.SchmidtJM2),
		N2:                fromJSONFloats(j.N2),
		MaxN2:             float64(j.MaxN2),
		ThermoclineM:      float64(j.ThermoclineM),
		MetaTopM:          float64(j.MetaTopM),
		MetaBottomM:       float64(j.MetaBottomM),
		HeatToTmdJM2:      float64(j.HeatToTmdJM2),
		FreezingPointC:    float64(j.FreezingPointC),
		SensorsUsed:       j.SensorsUsed,
		IntegrationDepthM: float64(j.IntegrationDepthM),
		ThermoclineMethod: j.ThermoclineMethod,
	}
	return nil
}
