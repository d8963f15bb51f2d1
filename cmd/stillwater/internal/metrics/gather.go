package metrics

import "github.com/prometheus/client_golang/prometheus"

// Values returns, for each value of label, the value of the gauge
// or counter name in g (the sum where other labels differ).
func Values(g prometheus.Gatherer, name, label string) (map[string]float64, error) {
	fams, err := g.Gather()
	if err != nil {
		return nil, err
	}
	out := map[string]float64{}
	for _, f := range fams {
		if f.GetName() != name {
			continue
		}
		for _, m := range f.GetMetric() {
			key := ""
			for _, lp := range m.GetLabel() {
				if lp.GetName() == label {
					key = lp.GetValue()
				}
			}
			switch {
			case m.GetCounter() != nil:
				out[key] += m.GetCounter().GetValue()
			case m.GetGauge() != nil:
				out[key] += m.GetGauge().GetValue()
			}
		}
	}
	return out, nil
}
