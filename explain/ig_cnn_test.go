package explain_test

import (
	"fmt"
	"path/filepath"
	"strings"
	"testing"

	"heedmap/explain"
)

// Integrated gradients' completeness (Sundararajan et al. 2017, §3, axiom
// and Proposition 1) on ReLU CNNs through the runtime: the compact
// ResNet-18, MobileNetV2 (ReLU6) and DenseNet-121 of testdata/nets, black
// baseline, midpoint rule, logit of the predicted class. The path integral
// of a ReLU network is piecewise smooth with kinks wherever a unit switches,
// so the quadrature error falls once m resolves the kinks, but not
// monotonically while it does not. For ResNet-18 and DenseNet-121 the check
// is that the gap falls at 8 → 32 → 128 steps and is within 5 % (the
// paper's suggested tolerance) at 128. The random-weight MobileNetV2 is
// reported, not checked: its score along the black-to-image path swings
// between −0.10 and 0.85 for F(x) − F(x′) = 0.52 (measured on a 200-point
// grid), so the relative gap is still 40 % at 128 steps and only settles
// near 1024 (0.3 %; 3.6 % at 2048: measured). The numbers are logged for the
// bench notes.
func TestIGCompletenessCNNs(t *testing.T) {
	var table []string
	checked := map[string]bool{"resnet18": true, "densenet121": true}
	for _, name := range []string{"resnet18", "densenet121", "mobilenet_v2"} {
		t.Run(name, func(t *testing.T) {
			net, x, _, _ := loadNet(t, filepath.Join("../testdata/nets", name))
			var gaps []float64
			row := name
			for _, m := range []int{8, 32, 128} {
				r, err := explain.IntegratedGradients{Steps: m, BatchSize: 32}.Attribute(ctx, net, x, explain.Predicted(explain.Logit))
				if err != nil {
					t.Fatal(err)
				}
				gaps = append(gaps, r.Gap)
				row += fmt.Sprintf(" | m=%d gap %.2f%%", m, 100*r.Gap)
				if m == 128 {
					row += fmt.Sprintf(" (F(x) = %.4g, F(x′) = %.4g)", r.Score, r.Baseline)
				}
			}
			if !checked[name] {
				row += " (reported, not checked)"
			}
			table = append(table, row)
			if checked[name] && (!(gaps[0] > gaps[1] && gaps[1] > gaps[2]) || gaps[2] > 0.05) {
				t.Errorf("completeness gaps %.3g at 8, 32, 128 steps: want them falling and ≤ 5%% at 128", gaps)
			}
		})
	}
	t.Logf("IG completeness gap |Σ IG − (F(x) − F(x′))| / |F(x) − F(x′)|, black baseline, midpoint rule:\n%s", strings.Join(table, "\n"))
}
